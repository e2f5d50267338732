"""Station filters and attributes against direct sums, pure shifts and synthetic truth.

References: the discrete Fourier sum written out (numpy), numpy.fft.irfft;
pure time shifts, the special case of surface-consistent residual statics
(Wiggins, Larner & Wisecup 1976; Ronen & Claerbout 1985); the synthetic
survey's true filters (descatter.tasks.synthetic, scatter and statics
scenarios); scipy.stats.spearmanr for rank correlation.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import spearmanr

from descatter.tasks.errors import ConfigError
from descatter.tasks.station_filters import (
    amplitude_db,
    best_spike,
    identity_mask,
    pair_counts,
    scattering_fraction,
    static_from_phase,
    station_coherence,
    station_response,
    time_filters,
)
from descatter.tasks.synthetic import station_truth, synthetic_spec
from descatter.tasks.wavelets import band_taper

DT = 0.004
N_FFT = 256
FREQS = np.fft.rfftfreq(N_FFT, DT)


def band(lo, hi):
    return FREQS[(FREQS >= lo) & (FREQS <= hi)]


@pytest.fixture(scope="module")
def scatter_truth():
    spec = synthetic_spec(size="demo", scenario="scatter", seed=3)
    return spec, station_truth(spec)


@pytest.fixture(scope="module")
def statics_truth():
    spec = synthetic_spec(size="tiny", scenario="statics", seed=5)
    return spec, station_truth(spec)


# --------------------------------------------------------------------------- responses and time filters


def test_station_response_is_half_the_log_power_on_the_unit_phase():
    rng = np.random.default_rng(0)
    r = rng.standard_normal((5, 7))
    z = np.exp(1j * rng.uniform(-np.pi, np.pi, (5, 7)))
    np.testing.assert_allclose(station_response(r, z), np.sqrt(np.exp(r)) * z, rtol=1e-14)
    with pytest.raises(ConfigError, match="same"):
        station_response(r, z[:, :3])


def test_time_filters_give_back_a_filter_from_its_whole_spectrum(statics_truth):
    spec, truth = statics_truth
    for kind in ("source", "receiver"):
        h = truth.of(kind).filter
        r = truth.response(kind, FREQS)  # every bin, 0 to Nyquist
        got = time_filters(r, freqs_hz=FREQS, n_fft=N_FFT, dt_s=DT, max_length_s=spec.n_filter * DT,
                           lead_s=-spec.filter_t0_s, taper=0.0, band_edge=0.0)
        np.testing.assert_allclose(got, h, atol=1e-12)  # numpy.fft.irfft inverts the DFT exactly


def test_time_filters_in_a_band_match_the_direct_fourier_sum():
    rng = np.random.default_rng(1)
    f = band(10, 65)
    r = rng.standard_normal((4, len(f))) + 1j * rng.standard_normal((4, len(f)))
    lead_s, length_s, taper, edge = 0.06, 0.3, 0.1, 0.2
    got = time_filters(r, freqs_hz=f, n_fft=N_FFT, dt_s=DT, max_length_s=length_s, lead_s=lead_s,
                       taper=taper, band_edge=edge)
    df = 1 / (N_FFT * DT)
    lo, hi = f[0] - df, f[-1] + df
    weight = band_taper(f - lo, corners_hz=(0, edge * (hi - lo), (hi - lo) * (1 - edge), hi - lo))
    t = -lead_s + DT * np.arange(round(length_s / DT))
    # h(t) = (1 / n_fft) sum over the Hermitian spectrum = (2 / n_fft) Re sum_k H_k exp(2 pi i f_k t)
    direct = 2 / N_FFT * np.real((r * weight) @ np.exp(2j * np.pi * np.outer(f, t)))
    n_edge = round(taper * len(t))
    ramp = np.sin(0.5 * np.pi * (np.arange(n_edge) + 0.5) / n_edge) ** 2
    window = np.ones(len(t))
    window[:n_edge], window[-n_edge:] = ramp, ramp[::-1]
    np.testing.assert_allclose(got, direct * window, atol=1e-12)
    assert weight[0] > 0 and weight[-1] > 0 and weight.min() < weight.max() == 1.0


@pytest.mark.parametrize("delay_s", [0.012, -0.02, 0.0])
def test_a_delayed_spike_peaks_at_its_delay(delay_s):
    f = band(4, 110)
    r = np.exp(-2j * np.pi * f * delay_s)[None, :]
    h = time_filters(r, freqs_hz=f, n_fft=N_FFT, dt_s=DT, max_length_s=0.2, lead_s=0.04)
    assert -0.04 + DT * np.argmax(h[0]) == pytest.approx(delay_s, abs=1e-12)


def test_time_filters_refuse_frequencies_off_the_fft_grid():
    with pytest.raises(ConfigError, match="bins"):
        time_filters(np.ones((1, 3)), freqs_hz=np.array([10.0, 11.0, 12.0]), n_fft=N_FFT, dt_s=DT,
                     max_length_s=0.2, lead_s=0.04)


# --------------------------------------------------------------------------- statics


def test_pure_shifts_give_their_statics_whatever_the_gauge():
    rng = np.random.default_rng(2)
    f = band(10, 65)
    n = 30
    tau = rng.uniform(-0.02, 0.02, n)
    component = np.repeat([0, 1], 15)
    common = np.exp(1j * rng.uniform(-np.pi, np.pi, len(f)))  # any phase per frequency, shared
    rotation = np.exp(1j * rng.uniform(-np.pi, np.pi, n))[:, None]  # a constant phase per station
    amplitude = rng.uniform(0.2, 3.0, (n, len(f)))
    r = amplitude * rotation * np.exp(-2j * np.pi * np.outer(tau, f)) * common
    weight = rng.uniform(0.5, 1.0, len(f))
    got = static_from_phase(r, freqs_hz=f, weight=weight, component=component)
    expect = tau - np.where(component == 0, tau[:15].mean(), tau[15:].mean())
    np.testing.assert_allclose(got, expect, atol=1e-12)
    one = static_from_phase(r, freqs_hz=f, weight=weight)
    np.testing.assert_allclose(one, tau - tau.mean(), atol=1e-12)


def test_statics_of_the_synthetic_statics_survey(statics_truth):
    _, truth = statics_truth
    f = band(10, 65)
    for kind in ("source", "receiver"):
        t = truth.of(kind).static_s  # zero mean over the kind's stations
        got = static_from_phase(truth.response(kind, f), freqs_hz=f, weight=np.ones(len(f)))
        # pure statics, the case of Wiggins et al. (1976): recovered to far below the
        # 0.05 ms rms of the data-driven prototype (DESIGN section 2)
        assert np.sqrt(np.mean((got - t) ** 2)) < 1e-6  # the windowed-sinc spike is a delay to ~1e-7 s


def test_stations_without_weight_or_label_get_zero_static():
    f = band(10, 65)
    r = np.exp(-2j * np.pi * np.outer([0.01, 0.02, -0.01], f))
    w = np.ones((3, len(f)))
    w[1] = 0.0
    got = static_from_phase(r, freqs_hz=f, weight=w, component=np.array([0, 0, -1]))
    assert got.tolist() == [0.0, 0.0, 0.0]  # station 0 alone in its component, 1 no weight, 2 no label


# --------------------------------------------------------------------------- scattering fraction


def test_a_pure_delayed_spike_has_no_scattering():
    rng = np.random.default_rng(3)
    f = band(10, 65)
    tau = rng.uniform(-0.1, 0.1, 20)
    amp = rng.uniform(0.5, 2, 20) * rng.choice([-1, 1], 20)
    r = amp[:, None] * np.exp(-2j * np.pi * np.outer(tau, f))
    w = rng.uniform(0.5, 1, len(f))
    np.testing.assert_allclose(scattering_fraction(r, freqs_hz=f, weight=w), 0.0, atol=1e-9)
    fraction, delay = best_spike(r, freqs_hz=f, weight=w)
    np.testing.assert_allclose(delay, tau, atol=1e-9)
    rotated = r * np.exp(1j * rng.uniform(-np.pi, np.pi, 20))[:, None]
    np.testing.assert_allclose(scattering_fraction(rotated, freqs_hz=f, weight=w, phase_rotation=True), 0.0, atol=1e-9)


@pytest.mark.parametrize("phase_rotation", [False, True])
def test_the_delay_scan_finds_the_global_maximum(phase_rotation):
    rng = np.random.default_rng(4)
    f = band(10, 65)
    r = rng.standard_normal((12, len(f))) + 1j * rng.standard_normal((12, len(f)))
    w = rng.uniform(0.2, 1, len(f))
    fraction, delay = best_spike(r, freqs_hz=f, weight=w, phase_rotation=phase_rotation)
    period = 1 / (f[1] - f[0])
    taus = np.linspace(-period / 2, period / 2, 200_001)  # brute force: 5 us steps over one period
    g = (w * r) @ np.exp(2j * np.pi * np.outer(f, taus))
    val = np.abs(g) ** 2 if phase_rotation else g.real**2
    ref = val.max(axis=1) / (w.sum() * (w * np.abs(r) ** 2).sum(axis=1))
    assert np.all(fraction >= ref - 1e-12)  # never below the best grid point
    np.testing.assert_allclose(fraction, ref, rtol=1e-6)
    np.testing.assert_allclose(delay, taus[np.argmax(val, axis=1)], atol=1e-5)


@pytest.mark.parametrize("phase_rotation", [False, True])
def test_grid_candidates_worked_out_at_the_maxima_equal_the_whole_grid_formula(phase_rotation):
    # the parabola heights and shifts are computed at the local maxima and the picks only; the
    # reference computes them at every grid point, as the scan first did (bit for bit the same)
    from scipy import fft as sfft

    from descatter.tasks.station_filters import _grid_candidates

    rng = np.random.default_rng(8)
    f = band(10, 65)
    c = rng.standard_normal((40, len(f))) + 1j * rng.standard_normal((40, len(f)))
    c[3] = 0.0  # no maximum at all: the picks fall on flat grid points
    c[4] = np.exp(-2j * np.pi * f * 0.01)  # one clean peak, fewer maxima than candidates
    size, k = 1080, 3
    period = 1 / (f[1] - f[0])
    step = period / size
    tau_grid = np.arange(size) * step
    tau_grid = tau_grid - period * (tau_grid > period / 2)
    g = sfft.ifft(c, size, axis=1) * size * np.exp(2j * np.pi * f[0] * tau_grid)
    val = np.abs(g) ** 2 if phase_rotation else g.real**2
    before, after = np.roll(val, 1, axis=1), np.roll(val, -1, axis=1)
    curve = before - 2 * val + after
    shift = np.where(curve < 0, 0.5 * (before - after) / np.where(curve < 0, curve, -1.0), 0.0)
    height = np.where((val > before) & (val >= after), val - 0.25 * (before - after) * shift, -1.0)
    top = np.argpartition(-height, k - 1, axis=1)[:, :k]
    reference = tau_grid[top] + step * np.take_along_axis(np.clip(shift, -0.5, 0.5), top, axis=1)
    got = _grid_candidates(c, f, size=size, phase_rotation=phase_rotation, candidates=k)
    np.testing.assert_array_equal(got, reference)


@pytest.mark.parametrize("phi", [0.1, 0.3, 0.5])
def test_a_spike_with_an_orthogonal_coda_scatters_its_coda_fraction(phi):
    rng = np.random.default_rng(5)
    n_fft, dt = 1024, 0.002
    freqs = np.fft.rfftfreq(n_fft, dt)
    f = freqs[(freqs >= 10) & (freqs <= 120)]
    n, tau = 16, 0.01
    t = np.arange(0, 0.4, dt)
    coda = rng.standard_normal((n, len(t))) * np.exp(-t / 0.1)  # a decaying coda after the spike
    c = coda @ np.exp(-2j * np.pi * np.outer(t + tau + 0.004, f))
    s = np.exp(-2j * np.pi * f * tau)
    c -= np.outer(c @ np.conj(s) / len(f), s)  # orthogonal to the spike over the band
    c *= np.sqrt(len(f) / (np.abs(c) ** 2).sum(axis=1))[:, None]
    r = np.sqrt(1 - phi) * s + np.sqrt(phi) * c
    got = scattering_fraction(r, freqs_hz=f, weight=np.ones(len(f)))
    assert np.all(got <= phi + 1e-9)  # the spike at tau alone explains 1 - phi
    assert np.all(got > phi - 0.05)


def test_scattering_ranks_stations_like_the_synthetic_truth(scatter_truth):
    _, truth = scatter_truth
    for kind in ("source", "receiver"):
        phi = truth.of(kind).scattering_fraction
        f = band(5, 100)  # the synthetic coda's band (3-100 Hz)
        got = scattering_fraction(truth.response(kind, f), freqs_hz=f, weight=np.ones(len(f)))
        assert spearmanr(got, phi)[0] >= 0.8, kind  # scipy.stats.spearmanr
        # in the narrower analysis band (10-65 Hz) the early coda falls inside the
        # band-limited spike and ranks are lower (0.71 sources, 0.78 receivers here)
        f = band(10, 65)
        narrow = scattering_fraction(truth.response(kind, f), freqs_hz=f, weight=np.ones(len(f)))
        assert spearmanr(narrow, phi)[0] >= 0.6, kind


# --------------------------------------------------------------------------- amplitude, counts, identity


def test_amplitude_db_is_the_mean_band_power_gain_about_its_mean():
    rng = np.random.default_rng(6)
    r = rng.normal(0, 1.5, (8, 10))
    w = rng.uniform(0, 1, 10)
    component = np.array([0, 0, 0, 1, 1, 1, 1, -1])
    got = amplitude_db(r, weight=w, component=component)
    loop = np.array([10 * np.log10(sum(w[k] * np.exp(r[j, k]) for k in range(10)) / w.sum()) for j in range(8)])
    for c in (0, 1):
        loop[component == c] -= loop[component == c].mean()
    loop[7] = 0.0
    np.testing.assert_allclose(got, loop, atol=1e-12)
    big = amplitude_db(np.full((2, 3), 800.0) + np.array([[0.0], [np.log(10)]]), weight=np.ones(3))
    np.testing.assert_allclose(big, [-5.0, 5.0])  # no overflow for large log powers


def test_pair_counts_and_station_coherence_match_loops():
    rng = np.random.default_rng(7)
    pairs = np.array([[0, 1], [0, 2], [1, 2], [2, 3], [1, 3]])
    count = rng.integers(1, 50, 5)
    coh = rng.uniform(0, 1, (5, 4))
    n_pairs, total = np.zeros(6, int), np.zeros(6)
    mean_coh = np.zeros(6)
    for (a, b), c, k in zip(pairs, count, coh.mean(axis=1)):
        for s in (a, b):
            n_pairs[s] += c
            total[s] += k
            mean_coh[s] += 1
    np.testing.assert_array_equal(pair_counts(pairs, count, 6), n_pairs)
    np.testing.assert_allclose(station_coherence(pairs, coh, 6), np.divide(total, mean_coh, out=np.zeros(6),
                                                                           where=mean_coh > 0))
    assert station_coherence(pairs, coh, 6)[5] == 0.0 and pair_counts(pairs, count, 6)[4] == 0


def test_stations_with_too_few_pairs_get_the_identity_filter():
    response = np.array([[2.0 + 1j, 1.0], [np.nan, 1.0], [0.5, 0.5j], [3.0, 3.0]], dtype=np.complex128)
    mask = identity_mask(np.array([10, 10, 2, 10]), min_pairs=5, response=response)
    assert mask.tolist() == [False, True, True, False]  # too few pairs, or a non-finite response


def test_smooth_gauge_removes_a_rough_common_phase_and_keeps_relative_filters():
    from descatter.tasks.station_filters import smooth_gauge

    rng = np.random.default_rng(21)
    f = 10.0 + 0.5 * np.arange(110)
    n = 40
    tau = rng.normal(scale=0.006, size=n)
    spikes = np.exp(rng.normal(scale=0.2, size=(n, 1))) * np.exp(-2j * np.pi * np.outer(tau, f))
    # the phase solve may hand back any common factor per frequency: a rough one here
    rough = spikes * np.exp(1j * rng.uniform(-np.pi, np.pi, len(f)))[None, :]
    ones = np.ones(len(f))
    assert np.median(scattering_fraction(rough, freqs_hz=f, weight=ones)) > 0.5
    got = smooth_gauge(rough, freqs_hz=f)
    # delayed spikes again (a common delay and polarity aside)
    assert np.max(scattering_fraction(got, freqs_hz=f, weight=ones)) < 1e-3
    np.testing.assert_allclose(got[:5] * np.conj(got[5:10]), rough[:5] * np.conj(rough[5:10]), rtol=1e-9)
    # per component, and label -1 untouched
    labels = np.repeat([0, 1, -1, 0], 10)
    two = smooth_gauge(rough, freqs_hz=f, component=labels)
    assert np.array_equal(two[20:30], rough[20:30])
    assert np.max(scattering_fraction(two[labels >= 0], freqs_hz=f, weight=ones)) < 1e-3


def test_filter_change_is_the_relative_rms_difference():
    from descatter.tasks.station_filters import filter_change

    old = np.array([[3.0, 4.0, 0.0], [1.0, 0.0, 0.0], [0.0, 0.0, 0.0]])
    new = np.array([[3.0, 4.0, 0.5], [0.0, 1.0, 0.0], [0.0, 0.0, 0.0], [1.0, 0.0, 0.0]])
    got = filter_change(old, new)
    # |(0, 0, 0.5)| / |(3, 4, 0)| = 0.5 / 5; |(-1, 1, 0)| / 1 = sqrt(2); zero to zero: 0; a new station: inf
    np.testing.assert_allclose(got[:3], [0.1, np.sqrt(2), 0.0])
    assert got[3] == np.inf
    assert np.all(filter_change(old, new[:, :2]) == np.inf)  # other lengths: not comparable
