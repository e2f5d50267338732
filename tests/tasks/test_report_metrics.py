import numpy as np
import pytest
import scipy.signal

from descatter.tasks.errors import ConfigError
from descatter.tasks.moveout import nmo_correct
from descatter.tasks.quality import amplitude_spectrum, bandpass, cmp_bin_indices, grouped_semblance, signal_to_noise
from descatter.tasks.report_metrics import (
    analysis_traces,
    batch_quality,
    cmp_bin_centres,
    cmp_bin_keys,
    even_shot_sample,
    extreme_station_pairs,
    group_signal_to_noise,
    mean_row_peak,
    merge_semblance_sums,
    nyquist_spacing_curve,
    pair_crosscorrelation,
    row_repeatability,
    semblance_from_sums,
    semblance_sums,
    snr_gain_db,
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
