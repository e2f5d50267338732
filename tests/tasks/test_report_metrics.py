import numpy as np
import pytest
import scipy.signal

from descatter.tasks import synthetic
from descatter.tasks.errors import ConfigError, GeometryError
from descatter.tasks.moveout import nmo_correct
from descatter.tasks.quality import (
    amplitude_spectrum, band_weights, bandpass, cmp_bin_indices, grouped_semblance, signal_to_noise,
)
from descatter.tasks.report_metrics import (
    analysis_traces,
    batch_quality,
    cmp_bin_centres,
    cmp_bin_keys,
    distribution_summary,
    even_shot_sample,
    extreme_station_pairs,
    group_signal_to_noise,
    match_stations,
    mean_row_peak,
    merge_semblance_sums,
    nyquist_spacing_curve,
    pair_crosscorrelation,
    row_repeatability,
    semblance_from_sums,
    semblance_sums,
    snr_gain_db,
    truth_clean_traces,
    upper_quantile_mask,
)


@pytest.mark.parametrize("ns, max_lag", [(64, 10), (50, 49), (30, 45)])
def test_pair_crosscorrelation_matches_scipy_correlate(ns, max_lag):
    # Reference: scipy.signal.correlate(a, b, mode="full"), index k + ns - 1 is lag k.
    rng = np.random.default_rng(0)
    a, b = rng.normal(size=(4, ns)), rng.normal(size=(4, ns))
    c = pair_crosscorrelation(a, b, max_lag=max_lag)
    assert c.shape == (4, 2 * max_lag + 1)
    for i in range(4):
        full = scipy.signal.correlate(a[i], b[i], mode="full", method="direct")
        expected = np.zeros(2 * max_lag + 1)
        for col, k in enumerate(range(-max_lag, max_lag + 1)):
            if abs(k) < ns:
                expected[col] = full[k + ns - 1]
        expected /= np.sqrt(np.sum(a[i] ** 2) * np.sum(b[i] ** 2))
        np.testing.assert_allclose(c[i], expected, atol=1e-12)


def test_pair_crosscorrelation_peak_gives_the_delay_and_zero_rows_stay_zero():
    rng = np.random.default_rng(1)
    b = rng.normal(size=(2, 200))
    a = np.roll(b, 7, axis=1)  # a arrives 7 samples after b
    a[1] = 0.0
    c = pair_crosscorrelation(a, b, max_lag=20)
    assert np.argmax(c[0]) - 20 == 7 and c[0].max() > 0.9
    assert np.all(c[1] == 0)
    with pytest.raises(ConfigError):
        pair_crosscorrelation(a, b[:, :10], max_lag=3)


def test_semblance_sums_merged_over_batches_equal_grouped_semblance():
    rng = np.random.default_rng(2)
    traces = rng.normal(size=(60, 80)) + rng.normal(size=80)
    groups = rng.integers(0, 7, 60)
    labels, s, count = grouped_semblance(traces, groups, start=10, stop=70)
    parts = [semblance_sums(traces[a:a + 17], groups[a:a + 17], start=10, stop=70) for a in range(0, 60, 17)]
    lab, stack, energy, cnt = merge_semblance_sums(parts)
    assert np.array_equal(lab, labels) and np.array_equal(cnt, count)
    np.testing.assert_allclose(semblance_from_sums(stack, energy, cnt), s, rtol=1e-12)


def test_group_signal_to_noise_uses_each_groups_count():
    s = np.array([0.5, 0.1, 0.9])
    n = np.array([10, 4, 30])
    expected = [float(signal_to_noise(v, n_traces=int(c))) for v, c in zip(s, n)]
    np.testing.assert_allclose(group_signal_to_noise(s, n), expected)
    assert group_signal_to_noise(np.array([0.2]), np.array([5]))[0] == 0.0  # s <= 1/N: nothing above noise


def test_snr_gain_db_is_finite_at_zero_and_infinite_snr():
    g = snr_gain_db(np.array([1.0, 0.0, 2.0]), np.array([10.0, 1.0, np.inf]), floor=1e-2, ceiling=1e4)
    np.testing.assert_allclose(g, [10.0, 20.0, 10 * np.log10(1e4 / 2.0)])


def test_even_shot_sample_takes_whole_shots_within_the_budget_spread_evenly():
    counts = np.full(100, 50)
    assert np.array_equal(even_shot_sample(counts, max_traces=10_000), np.arange(100))
    chosen = even_shot_sample(counts, max_traces=1_000)
    assert counts[chosen].sum() <= 1_000 and len(chosen) == 20
    assert chosen.min() < 5 and chosen.max() > 94  # from the start to the end of the survey
    uneven = np.arange(1, 41)
    chosen = even_shot_sample(uneven, max_traces=100)
    assert uneven[chosen].sum() <= 100 and len(chosen) >= 2
    assert len(even_shot_sample(np.array([500, 600]), max_traces=10)) == 1


def test_extreme_station_pairs_pick_lowest_and_highest_with_like_neighbours():
    x = np.arange(10) * 10.0
    y = np.zeros(10)
    values = np.array([0.5, 0.1, 0.6, 0.05, 0.7, 0.9, 0.3, 0.95, 0.4, 0.2])
    eligible = np.ones(10, bool)
    eligible[3] = False  # the lowest is not eligible (an identity station)
    pairs = extreme_station_pairs(values, x, y, eligible=eligible)
    # a low pair takes the lower of the two line neighbours (1: 0 at 0.5 over 2 at 0.6; 9 has only 8),
    # a high pair the higher (7: 8 at 0.4 over 6 at 0.3; 5: 4 at 0.7 over 6 at 0.3)
    assert pairs == [(1, 0, "low"), (9, 8, "low"), (7, 8, "high"), (5, 4, "high")]
    for j, k, _ in pairs:
        assert k != 3 and abs(x[j] - x[k]) <= 15.0
    assert len({frozenset(p[:2]) for p in pairs}) == len(pairs)
    assert extreme_station_pairs(values[:1], x[:1], y[:1], eligible=eligible[:1]) == []


def test_upper_quantile_mask_and_repeatability():
    v = np.arange(8, dtype=float)
    ok = np.ones(8, bool)
    ok[7] = False
    threshold, mask = upper_quantile_mask(v, eligible=ok)
    assert threshold == pytest.approx(np.quantile(np.arange(7.0), 0.75))
    assert mask.tolist() == [False] * 5 + [True, True, False]
    rng = np.random.default_rng(3)
    shape = rng.normal(size=40)
    assert row_repeatability(np.tile(shape, (5, 1))) == pytest.approx(1.0)
    assert abs(row_repeatability(rng.normal(size=(200, 400)))) < 0.05
    assert np.isnan(row_repeatability(shape[None, :]))
    assert mean_row_peak(np.array([[0.0, 1.0, 3.0], [0.0, 3.0, 0.0]])) == (2.0, 1)


def test_nyquist_spacing_curve_is_half_the_wavelength():
    # common practice (DESIGN section 5): 100-300 m/s near surface; at 50 Hz, wavelengths 2-6 m
    c = nyquist_spacing_curve(np.array([50.0, 100.0]), np.array([100.0, 300.0]))
    np.testing.assert_allclose(c, [[1.0, 0.5], [3.0, 1.5]])


def test_analysis_traces_is_nmo_then_bandpass():
    rng = np.random.default_rng(4)
    traces = rng.normal(size=(3, 120)).astype(np.float32)
    kw = dict(offset_m=np.array([0.0, 100.0, 300.0]), delay_s=0.0, dt_s=0.004)
    vel = dict(velocity_t0_s=[0.0, 1.0], velocity_vrms_mps=[1500.0, 2500.0])
    out = analysis_traces(traces, **kw, **vel, stretch_mute=0.5, band_hz=(10.0, 60.0), band_taper_hz=5.0)
    expected = bandpass(nmo_correct(traces, **kw, **vel, stretch_mute=0.5), dt_s=0.004, band_hz=(10.0, 60.0),
                        taper_hz=5.0)
    np.testing.assert_array_equal(out, expected)
    raw = analysis_traces(traces, **kw, **vel, stretch_mute=0.5, band_hz=None)
    np.testing.assert_array_equal(raw, nmo_correct(traces, **kw, **vel, stretch_mute=0.5))
    w = np.linspace(0.0, 1.0, 120)
    tapered = analysis_traces(traces, **kw, **vel, stretch_mute=0.5, band_hz=(10.0, 60.0), band_taper_hz=5.0,
                              window_weights=w)
    np.testing.assert_array_equal(tapered, expected * w)
    with pytest.raises(ConfigError):
        analysis_traces(traces, **kw, band_hz=(10.0, 60.0), band_taper_hz=5.0)


def test_batch_quality_is_grouped_semblance_of_the_band_limited_traces_and_spectrum_sums():
    # References: tasks.quality.grouped_semblance / amplitude_spectrum, applied step by step.
    rng = np.random.default_rng(5)
    flat = rng.normal(size=(12, 100)) + rng.normal(size=100)
    shots = np.repeat([3, 8, 9], 4)
    keys = cmp_bin_keys(rng.uniform(0, 30, 12), rng.uniform(0, 30, 12), bin_m=(10.0, 10.0), origin=(0.0, 0.0))
    w = np.hanning(100)
    q = batch_quality(flat, shots=shots, cmp_keys=keys, dt_s=0.004, band_hz=(10.0, 60.0), band_taper_hz=5.0,
                      start=20, stop=80, window_weights=w)
    limited = bandpass(flat, dt_s=0.004, band_hz=(10.0, 60.0), taper_hz=5.0)
    labels, s, count = grouped_semblance(limited, shots, start=20, stop=80)
    assert np.array_equal(q["shot"], labels) and np.array_equal(q["count"], count)
    np.testing.assert_allclose(q["semblance"], s, rtol=1e-12)
    cmp_labels, cmp_s, _ = grouped_semblance(limited, keys, start=20, stop=80)
    assert np.array_equal(q["cmp"][0], cmp_labels)
    np.testing.assert_allclose(semblance_from_sums(*q["cmp"][1:]), cmp_s, rtol=1e-12)
    freqs, mean = amplitude_spectrum(flat * w, dt_s=0.004)
    np.testing.assert_allclose(q["spectrum_sum"], 12 * mean, rtol=1e-12)
    assert np.array_equal(q["freqs_hz"], freqs)


def test_cmp_bin_keys_round_trip_to_bin_numbers_and_centres():
    rng = np.random.default_rng(6)
    x, y = rng.uniform(-50, 400, 200), rng.uniform(-80, 300, 200)
    kw = dict(bin_m=(12.5, 25.0), origin=(-60.0, -100.0))
    keys = cmp_bin_keys(x, y, **kw)
    ix, iy, cx, cy = cmp_bin_centres(keys, **kw)
    b = cmp_bin_indices(x, y, **kw)
    assert np.array_equal(ix, b[:, 0]) and np.array_equal(iy, b[:, 1])
    assert np.all(np.abs(cx - x) <= 6.25) and np.all(np.abs(cy - y) <= 12.5)


# --------------------------------------------------------------------------- comparison with a synthetic truth


def _numpy_band_limit(x: np.ndarray, *, dt_s: float, band_hz, taper_hz: float) -> np.ndarray:
    # the zero-phase band limit spelled out with numpy.fft: weights times the spectrum of the
    # zero-padded trace (length >= 2 ns, so the filter's tails do not wrap)
    n_fft = 2 * x.shape[1]
    w = band_weights(np.fft.rfftfreq(n_fft, dt_s), band_hz=band_hz, taper_hz=taper_hz)
    return np.fft.irfft(np.fft.rfft(x, n_fft, axis=-1) * w, n_fft, axis=-1)[:, : x.shape[1]]


def _truth_correlation(traces, truth, *, dt, band, taper, start, stop):
    """batch_quality's correlation with the truth, the truth band limited as analysis_traces does."""
    n, ns = traces.shape
    clean = bandpass(truth, dt_s=dt, band_hz=band, taper_hz=taper)
    q = batch_quality(traces, shots=np.arange(n), cmp_keys=np.zeros(n, np.int64), dt_s=dt, band_hz=band,
                      band_taper_hz=taper, start=start, stop=stop, window_weights=np.ones(ns), truth=clean)
    return q["truth_correlation"]


def test_truth_correlation_matches_a_numpy_recomputation():
    rng = np.random.default_rng(11)
    dt, band, taper, start, stop = 0.004, (10.0, 65.0), 5.0, 30, 170
    truth = rng.normal(size=(6, 200))
    traces = 0.7 * truth + rng.normal(size=(6, 200))
    got = _truth_correlation(traces, truth, dt=dt, band=band, taper=taper, start=start, stop=stop)
    a = _numpy_band_limit(traces, dt_s=dt, band_hz=band, taper_hz=taper)[:, start:stop]
    b = _numpy_band_limit(truth, dt_s=dt, band_hz=band, taper_hz=taper)[:, start:stop]
    expected = [np.dot(a[i], b[i]) / np.sqrt(np.dot(a[i], a[i]) * np.dot(b[i], b[i])) for i in range(6)]
    np.testing.assert_allclose(got, expected, rtol=1e-10)
    assert np.all((got > 0.3) & (got < 0.95))  # signal and independent noise of comparable power


def test_truth_correlation_is_one_for_a_scaled_copy_and_ignores_energy_outside_the_band():
    rng = np.random.default_rng(12)
    dt, n = 0.004, 256
    truth = _numpy_band_limit(rng.normal(size=(3, n)), dt_s=dt, band_hz=(15.0, 40.0), taper_hz=3.0)
    t = np.arange(n) * dt
    # a scaled copy, its negative, and a copy plus a 110 Hz hum far outside the 10-65 Hz band and its flanks
    traces = np.stack([3.0 * truth[0], -truth[1], truth[2] + 0.5 * np.sin(2 * np.pi * 110.0 * t)])
    c = _truth_correlation(traces, truth, dt=dt, band=(10.0, 65.0), taper=5.0, start=20, stop=230)
    np.testing.assert_allclose(c[:2], [1.0, -1.0], atol=1e-12)
    assert c[2] > 0.99
    raw = _truth_correlation(traces, truth, dt=dt, band=(0.0, 120.0), taper=1.0, start=20, stop=230)
    assert raw[2] < 0.9  # the same hum inside the band does lower it
    with pytest.raises(ConfigError, match="one clean trace per trace"):
        batch_quality(traces, shots=np.arange(3), cmp_keys=np.zeros(3, np.int64), dt_s=dt, band_hz=(10.0, 65.0),
                      band_taper_hz=5.0, start=0, stop=10, window_weights=np.ones(n), truth=truth[:2])


def test_match_stations_against_a_dense_distance_matrix():
    rng = np.random.default_rng(13)
    ref = rng.uniform(0, 1000, size=(50, 2))
    pick = rng.permutation(50)[:20]
    pts = ref[pick] + rng.normal(scale=0.004, size=(20, 2))
    pts[5] += 3.0  # no reference station within tolerance
    rows = match_stations(pts[:, 0], pts[:, 1], reference_x=ref[:, 0], reference_y=ref[:, 1], tolerance_m=0.05)
    d = np.hypot(pts[:, None, 0] - ref[None, :, 0], pts[:, None, 1] - ref[None, :, 1])
    expected = np.where(d.min(axis=1) <= 0.05, d.argmin(axis=1), -1)
    assert np.array_equal(rows, expected)
    assert rows[5] == -1 and np.array_equal(np.delete(rows, 5), np.delete(pick, 5))
    assert np.array_equal(match_stations(pts[:, 0], pts[:, 1], reference_x=[], reference_y=[], tolerance_m=1.0),
                          np.full(20, -1))


@pytest.fixture(scope="module")
def tiny_truth():
    spec = synthetic.synthetic_spec(size="tiny", scenario="scatter", seed=4)
    tables = synthetic.stations(spec)
    truth = synthetic.station_truth(spec, tables)
    return spec, truth, synthetic.truth_arrays(spec, truth, tables)


def test_truth_clean_traces_are_the_synthetic_clean_traces(tiny_truth):
    spec, truth, arrays = tiny_truth
    geom = synthetic.swath_traces(spec, 1)
    src, rcv = geom.source_index[:60], geom.receiver_index[:60]
    got = truth_clean_traces(arrays, src, rcv, n_samples=spec.n_samples)
    expected = synthetic.synthesize(spec, truth, src, rcv, station_filters=False, noise=False)
    assert got.dtype == np.float32 and np.array_equal(got, expected)
    # and the clean trace itself around the first reflection: its amplitude times the Ricker wavelet
    # (1 - 2 pi^2 fp^2 tau^2) exp(-pi^2 fp^2 tau^2) (Ricker 1953) centred on the hyperbolic moveout time
    # t = sqrt(t0^2 + x^2 / v^2) (Yilmaz 2001, section 3.1); the next reflection is 0.13 s later
    fp, dt = float(arrays["peak_hz"]), spec.dt_s
    t0, amplitude = arrays["reflector_t0_s"][0], arrays["reflector_amplitude"][0]
    v = np.interp(t0, arrays["velocity_t0_s"], arrays["velocity_vrms_mps"])
    for i in (0, 37):
        x = np.hypot(arrays["source_x"][src[i]] - arrays["receiver_x"][rcv[i]],
                     arrays["source_y"][src[i]] - arrays["receiver_y"][rcv[i]])
        t = np.sqrt(t0**2 + x**2 / v**2)
        k = np.arange(int((t - 0.05) / dt), int((t + 0.05) / dt))
        tau2 = (np.pi * fp * (k * dt - t)) ** 2
        np.testing.assert_allclose(got[i, k], amplitude * (1 - 2 * tau2) * np.exp(-tau2), atol=1e-6)


def test_truth_clean_traces_name_what_is_missing_or_out_of_range(tiny_truth):
    spec, _, arrays = tiny_truth
    partial = {k: v for k, v in arrays.items() if k != "reflector_t0_s"}
    with pytest.raises(ConfigError, match="reflector_t0_s"):
        truth_clean_traces(partial, [0], [0], n_samples=spec.n_samples)
    n_rcv = len(arrays["receiver_x"])
    with pytest.raises(GeometryError, match=f"receiver_rows spans 0..{n_rcv}"):
        truth_clean_traces(arrays, [0, 1], [0, n_rcv], n_samples=spec.n_samples)


def test_distribution_summary_by_hand():
    # numpy's default (linear) quantiles: Hyndman & Fan (1996) definition 7
    s = distribution_summary(np.array([4.0, 0.0, np.nan, 3.0, 1.0, 2.0]), edges=np.array([0.0, 1.0, 2.5, 4.0]))
    assert s["count"] == 5 and s["mean"] == 2.0 and s["median"] == 2.0
    assert (s["q10"], s["q25"], s["q75"], s["q90"]) == pytest.approx((0.4, 1.0, 3.0, 3.6))
    assert s["counts"].tolist() == [1, 2, 2]  # [0, 1), [1, 2.5), [2.5, 4] closed on the right
    empty = distribution_summary(np.array([np.nan]), edges=np.array([0.0, 1.0]))
    assert empty["count"] == 0 and np.isnan(empty["median"]) and empty["counts"].tolist() == [0]
    with pytest.raises(ConfigError):
        distribution_summary(np.zeros(3), edges=np.array([1.0, 1.0]))
