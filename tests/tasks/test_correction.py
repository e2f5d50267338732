import numpy as np
import pytest
import scipy.fft as sfft
import scipy.linalg
from scipy.stats import spearmanr

from descatter.tasks.correction import (
    apply_correction,
    band_to_full_grid,
    correction_n_fft,
    correction_spectrum,
    grid_band_weight,
    least_squares_inverse,
    prewhitening_spectrum,
    trace_correction,
    truncated_inverse_filters,
    unusable_responses,
)
from descatter.tasks.errors import ConfigError, GeometryError
from descatter.tasks.quality import bandpass, zero_lag_correlation
from descatter.tasks.synthetic import station_response, station_truth, stations, swath_traces, synthesize, synthetic_spec


def _random_response(rng, shape):
    return rng.normal(size=shape) + 1j * rng.normal(size=shape)


# --------------------------------------------------------------------------- textbook inverse filters


def test_spectral_inverse_of_the_minimum_phase_dipole_is_the_geometric_series():
    # Robinson & Treitel, "Geophysical Signal Analysis" (1980): the inverse of the minimum-phase
    # dipole (1, -1/2) is 1/(1 - z/2) = 1, 1/2, 1/4, ... On an n-point grid it is periodised:
    # 2^-k / (1 - 2^-n), within 1e-19 of 2^-k for n = 64.
    n = 64
    k = np.arange(n)
    exact = 0.5**k
    h = sfft.rfft([1.0, -0.5], n)
    np.testing.assert_allclose(sfft.irfft(correction_spectrum(h, prewhitening=0.0), n), exact, atol=1e-15)
    # Prewhitening error, from the closed form alone: |H(w)|^2 = 5/4 - cos w (mean 5/4 over the
    # grid), so F - 1/H = -eps / (H (|H|^2 + eps)) with eps = p 5/4, and every time sample is
    # off by at most the mean of |F - 1/H| over the full circle of n bins.
    w = 2 * np.pi * k / n
    power = 1.25 - np.cos(w)
    for p in (1e-3, 1e-2):
        eps = p * 1.25
        bound = np.mean(eps / (np.sqrt(power) * (power + eps)))
        got = sfft.irfft(correction_spectrum(h, prewhitening=p), n)
        error = np.max(np.abs(got - exact))
        assert 0.2 * bound < error <= bound  # the error is there, and within the prewhitening error


def test_two_term_least_squares_inverse_of_the_dipole():
    # Yilmaz, "Seismic Data Analysis" (2001), section 2.3: the two-term least-squares inverse of
    # (1, -1/2) is (0.95, 0.38). By hand: autocorrelation (5/4, -1/2), right side (1, 0),
    # [[5/4, -1/2], [-1/2, 5/4]] a = [1, 0]  ->  a = (20/21, 8/21).
    np.testing.assert_allclose(least_squares_inverse(np.array([1.0, -0.5]), n_taps=2), [20 / 21, 8 / 21], rtol=1e-13)
    np.testing.assert_allclose(
        truncated_inverse_filters(np.array([[1.0, -0.5]]), n_taps=2, lag=0, prewhitening=0.0),
        [[20 / 21, 8 / 21]], rtol=1e-13,
    )
    # longer least-squares inverses approach the exact inverse 1, 1/2, 1/4, ... (Robinson & Treitel)
    long = least_squares_inverse(np.array([1.0, -0.5]), n_taps=24)
    np.testing.assert_allclose(long[:12], 0.5 ** np.arange(12), atol=1e-6)


def test_a_maximum_phase_dipole_needs_a_delayed_spike():
    # Robinson & Treitel (1980); Yilmaz (2001) section 2.3: the least-squares inverse of a
    # maximum-phase wavelet (-1/2, 1) to a zero-lag spike is poor; a spike delayed to the end of
    # the filter is matched well.
    x = np.array([-0.5, 1.0])

    def error(lag):
        y = np.convolve(least_squares_inverse(x, n_taps=10, lag=lag), x)
        return np.sum((y - np.eye(len(y))[lag]) ** 2)

    assert error(0) > 0.5 and error(9) < 1e-4


def test_least_squares_design_against_a_dense_solve():
    # Reference: the same least-squares problem as a dense system, min |C a - d|^2 + p r0 |a|^2,
    # with C the full convolution matrix (scipy.linalg.convolution_matrix) and numpy.linalg.lstsq.
    rng = np.random.default_rng(7)
    filters = rng.normal(size=(6, 25)) * np.exp(-np.arange(25) / 8.0)
    for n_taps, lag, p in ((30, 0, 0.0), (30, 12, 0.01), (17, 40, 0.1)):
        batched = truncated_inverse_filters(filters, n_taps=n_taps, lag=lag, prewhitening=p)
        for row, got in zip(filters, batched):
            c = scipy.linalg.convolution_matrix(row, n_taps, mode="full")
            d = np.zeros(c.shape[0])
            d[lag] = 1.0
            damp = np.sqrt(p * np.sum(row**2)) * np.eye(n_taps)
            expected = np.linalg.lstsq(np.vstack([c, damp]), np.concatenate([d, np.zeros(n_taps)]), rcond=None)[0]
            np.testing.assert_allclose(got, expected, atol=1e-8)
            np.testing.assert_allclose(least_squares_inverse(row, n_taps=n_taps, lag=lag, prewhitening=p), got, atol=1e-10)


def test_dead_filters_get_the_delayed_identity_and_bad_designs_are_refused():
    out = truncated_inverse_filters(np.zeros((2, 5)), n_taps=4, lag=2, prewhitening=0.0)
    np.testing.assert_array_equal(out, [[0, 0, 1, 0], [0, 0, 1, 0]])
    np.testing.assert_array_equal(least_squares_inverse(np.zeros(3), n_taps=3, lag=1), [0, 1, 0])
    with pytest.raises(ConfigError, match="lag = 9"):
        least_squares_inverse(np.ones(2), n_taps=3, lag=9)
    with pytest.raises(ValueError, match="prewhitening = -0.1"):
        truncated_inverse_filters(np.ones((1, 2)), n_taps=3, lag=0, prewhitening=-0.1)


# --------------------------------------------------------------------------- spectra


def test_correction_spectrum_against_the_formula():
    rng = np.random.default_rng(1)
    h = _random_response(rng, (5, 33))
    h[2, 4] = 0.0
    f = correction_spectrum(h, mode="full", prewhitening=0.05)
    for row_h, row_f in zip(h, f):  # reference: the formula, row by row
        eps = 0.05 * np.mean(np.abs(row_h) ** 2)
        np.testing.assert_allclose(row_f, np.conj(row_h) / (np.abs(row_h) ** 2 + eps), rtol=1e-13)
    np.testing.assert_allclose(correction_spectrum(h[[0, 1]], prewhitening=0.0) * h[[0, 1]], 1.0, rtol=1e-12)
    phase = correction_spectrum(h, mode="phase")
    np.testing.assert_allclose(phase * h, np.abs(h), atol=1e-12)  # phase only: amplitude left as measured
    assert phase[2, 4] == 1 and np.allclose(np.abs(np.delete(phase.ravel(), 2 * 33 + 4)), 1)
    assert correction_spectrum(h, prewhitening=0.0)[2, 4] == 0  # the limit of conj(H)/(|H|^2+eps) at H = 0
    target = np.linspace(0, 1, 33)
    np.testing.assert_allclose(correction_spectrum(h, shaping=target), correction_spectrum(h) * target, rtol=1e-15)
    with pytest.raises(ValueError, match="mode = 'amplitude'"):
        correction_spectrum(h, mode="amplitude")


def test_unusable_responses_get_the_identity_never_nan():
    rng = np.random.default_rng(2)
    h = _random_response(rng, (4, 16))
    h[1] = 0.0
    h[3, 5] = np.nan
    assert unusable_responses(h).tolist() == [False, True, False, True]
    for mode in ("full", "phase"):
        f = correction_spectrum(h, mode=mode)
        assert np.all(np.isfinite(f))
        np.testing.assert_array_equal(f[[1, 3]], 1.0)


def test_trace_correction_combines_source_and_receiver():
    rng = np.random.default_rng(3)
    s, r = _random_response(rng, (4, 20)), _random_response(rng, (6, 20))
    si, ri = rng.integers(0, 4, 50), rng.integers(0, 6, 50)
    got = trace_correction(s, r, si, ri, prewhitening=0.02)
    for k in range(50):  # reference: one trace at a time
        np.testing.assert_allclose(got[k], correction_spectrum(s[si[k]] * r[ri[k]], prewhitening=0.02), rtol=1e-13)
    with pytest.raises(GeometryError, match="receiver_index spans 0..6"):
        trace_correction(s, r, si, np.r_[ri[:-1], 6])
    with pytest.raises(GeometryError, match="one pair per trace"):
        trace_correction(s, r, si, ri[:-1])


def test_band_to_full_grid_is_identity_outside_and_smooth_between():
    rng = np.random.default_rng(4)
    n_rfft, taper = 129, 6
    band = np.arange(20, 61)
    h = 0.3 * _random_response(rng, (3, len(band))) + 0.5
    full = band_to_full_grid(h, band_index=band, n_rfft=n_rfft, taper=taper)
    np.testing.assert_array_equal(full[:, band], h)
    far = np.r_[0 : band[0] - taper, band[-1] + taper + 1 : n_rfft]
    np.testing.assert_array_equal(full[:, far], 1.0 + 0j)
    # transition: log-amplitude and phase go monotonically from the edge value to zero
    below = full[:, band[0] - taper - 1 : band[0] + 1]
    for name, values in (("log amplitude", np.log(np.abs(below))), ("phase", np.angle(below))):
        steps = np.diff(values, axis=1) * np.sign(values[:, -1:])
        assert np.all(steps >= -1e-12), name
    assert np.all(np.abs(full) > 0)
    # gaps inside the band take the nearest measured bin's value, tapered
    gapped = band_to_full_grid(h[:, [0, 1, 3]], band_index=np.array([10, 11, 15]), n_rfft=40, taper=2)
    np.testing.assert_allclose(gapped[0, 12], np.exp(np.cos(np.pi / 6) ** 2 * np.log(h[0, 1])), rtol=1e-14)
    with pytest.raises(ConfigError, match="strictly increasing"):
        band_to_full_grid(h[:, :2], band_index=np.array([5, 5]), n_rfft=40, taper=2)


def test_out_of_band_energy_passes_untouched():
    # A sinusoid on an exact bin of the n_fft grid (periodic over the buffer) sits in one bin only.
    rng = np.random.default_rng(5)
    n_fft, taper = 256, 4
    band = np.arange(20, 70)
    full = band_to_full_grid(_random_response(rng, (1, len(band))), band_index=band, n_rfft=n_fft // 2 + 1, taper=taper)
    weight = grid_band_weight(band_index=band, n_rfft=n_fft // 2 + 1, taper=taper)
    t = np.arange(n_fft)
    out_of_band, in_band = np.cos(2 * np.pi * 100 * t / n_fft), np.cos(2 * np.pi * 40 * t / n_fft)
    traces = np.stack([out_of_band, in_band])
    f = trace_correction(full, np.ones_like(full), [0, 0], [0, 0], prewhitening=0.3, band_weight=weight)
    got = apply_correction(traces, f, n_fft=n_fft)
    np.testing.assert_allclose(got[0], out_of_band, atol=1e-6)
    assert np.max(np.abs(got[1] - in_band)) > 0.1
    # without the band weight the prewhitening scales everything, the identity bins too: 1 / (1 + eps)
    f = trace_correction(full, np.ones_like(full), [0, 0], [0, 0], prewhitening=0.3)
    plain = apply_correction(traces, f, n_fft=n_fft)
    assert np.max(np.abs(plain[0] - out_of_band)) > 0.05


# --------------------------------------------------------------------------- per-frequency prewhitening


def _wiener(h, p_e, p_n):
    # Wiener (1949): for D = H E + N, E and N independent with powers P_e(f) and P_n(f), the F
    # minimising the expected |F D - E|^2 at each frequency is conj(H) P_e / (|H|^2 P_e + P_n).
    return np.conj(h) * p_e / (np.abs(h) ** 2 * p_e + p_n)


def test_per_frequency_prewhitening_gives_the_wiener_filter():
    # eps(f) = p(f) mean |H|^2 with p = P_n / (P_e mean |H|^2) is P_n / P_e: the Wiener filter.
    rng = np.random.default_rng(21)
    n = 40
    h = _random_response(rng, (3, n))
    p_e, p_n = rng.uniform(0.5, 2.0, n), rng.uniform(0.01, 1.5, n)
    for row in h:
        p = p_n / (p_e * np.mean(np.abs(row) ** 2))
        np.testing.assert_allclose(correction_spectrum(row[None], prewhitening=p)[0], _wiener(row, p_e, p_n),
                                   rtol=1e-12)
    # over a band: the band's mean power; identity responses outside it pass exactly
    band = np.arange(10, 30)
    weight = np.zeros(n)
    weight[band] = 1.0
    row = np.ones(n, np.complex128)
    row[band] = h[0, band]
    p = p_n / (p_e * np.mean(np.abs(row[band]) ** 2))
    got = trace_correction(row[None], np.ones((1, n)), [0], [0], prewhitening=p, band_weight=weight)[0]
    np.testing.assert_allclose(got[band], _wiener(row[band], p_e[band], p_n[band]), rtol=1e-12)
    np.testing.assert_array_equal(np.delete(got, band), 1.0)


def test_per_frequency_prewhitening_minimises_the_error_by_brute_force():
    # No formula on the reference side: per frequency, draw E and N at their powers, form D = H E + N,
    # and search a 801 x 801 grid of complex F for the least sample mean of |F D - E|^2 (a quadratic
    # in F, so exact from the sample moments <|D|^2>, <D conj E>, <|E|^2>). |F| <= 1 / |H| for any
    # candidate worth having, so the grid spans +-2 / |H|.
    rng = np.random.default_rng(22)
    n_freq, m = 6, 200_000
    h = _random_response(rng, n_freq)
    p_e, p_n = rng.uniform(0.5, 2.0, n_freq), rng.uniform(0.05, 2.0, n_freq)
    e = np.sqrt(p_e / 2) * (rng.normal(size=(m, n_freq)) + 1j * rng.normal(size=(m, n_freq)))
    d = h * e + np.sqrt(p_n / 2) * (rng.normal(size=(m, n_freq)) + 1j * rng.normal(size=(m, n_freq)))
    dd, de, ee = np.mean(np.abs(d) ** 2, 0), np.mean(d * np.conj(e), 0), np.mean(np.abs(e) ** 2, 0)
    f = correction_spectrum(h[None], prewhitening=p_n / (p_e * np.mean(np.abs(h) ** 2)))[0]
    for k in range(n_freq):
        axis = np.linspace(-2, 2, 801) / abs(h[k])
        grid = axis[:, None] + 1j * axis[None, :]
        mse = np.abs(grid) ** 2 * dd[k] - 2 * np.real(grid * de[k]) + ee[k]
        best = grid.flat[np.argmin(mse)]
        step = axis[1] - axis[0]
        # within two grid steps plus the sampling error of 2e5 draws (about 0.3 % of 1 / |H|)
        assert abs(best - f[k]) < 2 * step + 0.01 / abs(h[k]), k
        kernel_mse = abs(f[k]) ** 2 * dd[k] - 2 * np.real(f[k] * de[k]) + ee[k]
        assert kernel_mse <= mse.min() * (1 + 1e-3), k


def test_one_prewhitening_per_frequency_keeps_the_scalar_path():
    rng = np.random.default_rng(23)
    h = _random_response(rng, (4, 30))
    weight = grid_band_weight(band_index=np.arange(8, 20), n_rfft=30, taper=3)
    for band_weight in (None, weight):  # a constant spectrum is the scalar, bit for bit
        np.testing.assert_array_equal(correction_spectrum(h, prewhitening=np.full(30, 0.2), band_weight=band_weight),
                                      correction_spectrum(h, prewhitening=0.2, band_weight=band_weight))
    varying = rng.uniform(0.0, 1.0, 30)
    got = trace_correction(h[:2], h[2:], [0, 1, 1], [1, 0, 1], prewhitening=varying, band_weight=weight)
    for k, (a, b) in enumerate(([0, 1], [1, 0], [1, 1])):  # reference: one trace at a time
        np.testing.assert_allclose(got[k], correction_spectrum(h[a] * h[2 + b], prewhitening=varying,
                                                               band_weight=weight), rtol=1e-13)
    with pytest.raises(ConfigError, match=r"prewhitening has shape \(29,\)"):
        correction_spectrum(h, prewhitening=varying[:29])
    with pytest.raises(ConfigError, match=r"values \[-0.5\] out of range"):
        correction_spectrum(h, prewhitening=np.r_[varying[:29], -0.5])
    with pytest.raises(ConfigError, match="prewhitening = -0.1"):
        correction_spectrum(h, prewhitening=-0.1)


def test_prewhitening_spectrum_interpolates_the_band_and_holds_its_edges():
    band_hz = np.array([10.0, 12.0, 14.0])
    grid_hz = np.array([0.0, 10.0, 11.0, 13.5, 14.0, 30.0])
    got = prewhitening_spectrum([0.5, 1.5, 0.25], band_hz=band_hz, grid_hz=grid_hz, scale=2.0)
    # by hand: 2 x (0.5 held below, 0.5, (0.5 + 1.5) / 2, 1.5 + 0.75 (0.25 - 1.5), 0.25, 0.25 held above)
    np.testing.assert_allclose(got, [1.0, 1.0, 2.0, 1.125, 0.5, 0.5], rtol=1e-15)
    with pytest.raises(ConfigError, match=r"noise_to_signal holds \[nan\]"):
        prewhitening_spectrum([0.5, np.nan, 0.25], band_hz=band_hz, grid_hz=grid_hz)
    with pytest.raises(ConfigError, match="scale = -1"):
        prewhitening_spectrum([0.5, 1.5, 0.25], band_hz=band_hz, grid_hz=grid_hz, scale=-1)
    with pytest.raises(ConfigError, match="strictly increasing"):
        prewhitening_spectrum([0.5, 1.5, 0.25], band_hz=band_hz[::-1], grid_hz=grid_hz)


# --------------------------------------------------------------------------- application


def test_apply_correction_is_linear_convolution_without_wrap_around():
    # Reference: numpy.convolve of the trace with a filter whose sample m sits at lag m - lead.
    rng = np.random.default_rng(6)
    n, ns, length, lead = 7, 300, 61, 20
    traces = rng.normal(size=(n, ns)).astype(np.float32)
    filters = rng.normal(size=(n, length))
    n_fft = correction_n_fft(ns, filter_samples=length)
    lags = np.arange(length) - lead
    spectra = filters @ np.exp(-2j * np.pi * np.outer(lags, np.arange(n_fft // 2 + 1)) / n_fft)
    expected = np.stack([np.convolve(x, h)[lead : lead + ns] for x, h in zip(traces.astype(np.float64), filters)])
    got = apply_correction(traces, spectra, n_fft=n_fft)
    assert got.dtype == np.float32
    np.testing.assert_allclose(got, expected, atol=2e-5 * np.abs(expected).max())
    # too short a buffer wraps the filter's tails into the trace
    short = ns + 10
    spectra = filters @ np.exp(-2j * np.pi * np.outer(lags, np.arange(short // 2 + 1)) / short)
    wrapped = apply_correction(traces, spectra, n_fft=short)
    assert np.max(np.abs(wrapped - expected)) > 0.1 * np.abs(expected).max()


def test_dead_nan_and_passthrough_traces_come_back_unchanged():
    rng = np.random.default_rng(8)
    traces = rng.normal(size=(5, 100)).astype(np.float32)
    traces[1] = 0.0
    traces[3, 7] = np.nan
    f = correction_spectrum(_random_response(rng, (5, 129)))
    got = apply_correction(traces, f, n_fft=256, passthrough=np.array([0, 0, 1, 0, 0], dtype=bool))
    for k in (1, 2, 3):
        np.testing.assert_array_equal(got[k], traces[k])
    assert not np.allclose(got[0], traces[0]) and np.all(np.isfinite(got[[0, 4]]))
    with pytest.raises(ConfigError, match="rfft grid of n_fft = 128"):
        apply_correction(traces, f, n_fft=128)


@pytest.fixture(scope="module")
def survey():
    spec = synthetic_spec(size="tiny", scenario="scatter", seed=3)
    tables = stations(spec)
    truth = station_truth(spec, tables)
    geometry = swath_traces(spec, 1, tables)
    distorted = synthesize(spec, truth, geometry, noise=False)
    clean = synthesize(spec, truth, geometry, station_filters=False, noise=False)
    return spec, truth, geometry, distorted, clean


def test_known_filters_restore_the_synthetic_survey(survey):
    # Synthetic survey with known truth (tasks.synthetic, scenario scatter, tiny): correcting
    # noise-free traces with the true source and receiver responses (full mode, prewhitening 0.01)
    # brings them back to the traces without station filters, compared in the survey's band and
    # analysis window: zero-lag correlation above 0.95 on most traces (measured: median 0.986,
    # 90% above 0.95, lowest 0.83), against a median of 0.13 before correction.
    spec, truth, geometry, distorted, clean = survey
    n_fft = correction_n_fft(spec.n_samples, filter_samples=2 * spec.n_filter)
    freqs = sfft.rfftfreq(n_fft, spec.dt_s)
    s, r = station_response(truth, "source", freqs), station_response(truth, "receiver", freqs)
    f = trace_correction(s, r, geometry.source_index, geometry.receiver_index, mode="full", prewhitening=0.01)
    corrected = apply_correction(distorted, f, n_fft=n_fft)
    band = dict(dt_s=spec.dt_s, band_hz=spec.band_hz, taper_hz=5.0)
    start, stop = int(0.15 / spec.dt_s), int(round(0.9 / spec.dt_s))  # the window these were measured on
    reference = bandpass(clean, **band)
    after = zero_lag_correlation(bandpass(corrected, **band), reference, start=start, stop=stop)
    before = zero_lag_correlation(bandpass(distorted, **band), reference, start=start, stop=stop)
    assert np.median(before) < 0.3
    assert np.median(after) > 0.98 and np.mean(after > 0.95) > 0.85 and after.min() > 0.75
    # what is left is the prewhitening error: worst where |H|^2 is small against eps in the band
    h = s[geometry.source_index] * r[geometry.receiver_index]
    power = np.abs(h) ** 2
    eps = 0.01 * power.mean(axis=1, keepdims=True)
    in_band = (freqs >= spec.band_hz[0]) & (freqs <= spec.band_hz[1])
    predicted = np.mean(eps / (power + eps), axis=1, where=in_band)
    assert spearmanr(1 - after, predicted)[0] > 0.5


def test_band_limited_responses_restore_the_band(survey):
    # The same correction from responses known only in the band, extended with band_to_full_grid
    # (measured: median 0.986 in the band, as with responses on the whole grid).
    spec, truth, geometry, distorted, clean = survey
    n_fft = correction_n_fft(spec.n_samples, filter_samples=2 * spec.n_filter)
    freqs = sfft.rfftfreq(n_fft, spec.dt_s)
    band_index = np.flatnonzero((freqs >= spec.band_hz[0]) & (freqs <= spec.band_hz[1]))
    grid = dict(band_index=band_index, n_rfft=len(freqs), taper=4)
    s, r = (band_to_full_grid(station_response(truth, kind, freqs[band_index]), **grid) for kind in ("source", "receiver"))
    f = trace_correction(s, r, geometry.source_index, geometry.receiver_index, prewhitening=0.01,
                         band_weight=grid_band_weight(**grid))
    corrected = apply_correction(distorted, f, n_fft=n_fft)
    band = dict(dt_s=spec.dt_s, band_hz=(spec.band_hz[0] + 3, spec.band_hz[1] - 3), taper_hz=3.0)
    start, stop = int(0.15 / spec.dt_s), int(round(0.9 / spec.dt_s))  # the window these were measured on
    after = zero_lag_correlation(bandpass(corrected, **band), bandpass(clean, **band), start=start, stop=stop)
    assert np.median(after) > 0.98


def test_filter_spectra_matches_a_direct_dft():
    # numpy.fft conventions: H(f) = sum_t h(t) exp(-2 pi i f t), here with t = q dt - lead
    from descatter.tasks.correction import filter_spectra

    rng = np.random.default_rng(8)
    h = rng.standard_normal((3, 20))
    dt, lead, n_fft = 0.004, 0.012, 64
    got = filter_spectra(h, lead_s=lead, dt_s=dt, n_fft=n_fft)
    f = np.fft.rfftfreq(n_fft, dt)
    t = np.arange(20) * dt - lead
    ref = h @ np.exp(-2j * np.pi * np.outer(t, f))
    assert np.allclose(got, ref, atol=1e-10)


def test_single_precision_path_matches_double_to_float32_rounding():
    """complex64 station responses keep the correction and its application in single
    precision; against the float64 path the traces differ by float32 rounding only."""
    rng = np.random.default_rng(31)
    n, ns, n_fft = 300, 250, 400
    n_rfft = n_fft // 2 + 1
    s = np.exp(0.3 * rng.normal(size=(20, n_rfft)) + 1j * rng.uniform(-3, 3, (20, n_rfft)))
    r = np.exp(0.3 * rng.normal(size=(30, n_rfft)) + 1j * rng.uniform(-3, 3, (30, n_rfft)))
    si, ri = rng.integers(0, 20, n), rng.integers(0, 30, n)
    w = np.clip(np.linspace(-1, 3, n_rfft), 0, 1)
    pw = np.linspace(0.05, 0.5, n_rfft)
    traces = rng.normal(size=(n, ns)).astype(np.float32)
    kw = dict(mode="full", prewhitening=pw, band_weight=w, shaping=np.linspace(1, 0.5, n_rfft))
    f64 = trace_correction(s, r, si, ri, **kw)
    f32 = trace_correction(s.astype(np.complex64), r.astype(np.complex64), si, ri, **kw)
    assert f64.dtype == np.complex128 and f32.dtype == np.complex64
    assert np.max(np.abs(f32 - f64)) <= 1e-5 * np.max(np.abs(f64))
    y64 = apply_correction(traces, f64, n_fft=n_fft)
    y32 = apply_correction(traces, f32, n_fft=n_fft)
    assert y32.dtype == np.float32
    rel = np.sqrt(np.mean((y32 - y64) ** 2) / np.mean(y64.astype(np.float64) ** 2))
    assert 0 < rel < 1e-5  # not the same code path, but only rounding apart
