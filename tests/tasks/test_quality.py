import math
from dataclasses import replace

import numpy as np
import pytest
import scipy.fft as sfft
from scipy.spatial.distance import cosine

from descatter.tasks.correction import apply_correction, correction_n_fft, trace_correction
from descatter.tasks.errors import ConfigError
from descatter.tasks.quality import (
    COMMON_PRACTICE_MAX_SPACING_M,
    amplitude_spectrum,
    band_weights,
    bandpass,
    cmp_bin_indices,
    gather_semblance,
    grouped_semblance,
    semblance,
    signal_to_noise,
    spacing_adequacy,
    zero_lag_correlation,
)
from descatter.tasks.synthetic import station_response, station_truth, stations, swath_traces, synthesize, synthetic_spec
from descatter.tasks.wavelets import band_taper, ricker


def _flat_events(rng, n_samples, *, dt_s=0.004, spacing=40):
    """One trace of 30 Hz Ricker events every ~``spacing`` samples with random amplitudes, unit mean power."""
    spikes = np.zeros(n_samples)
    at = np.arange(spacing, n_samples - spacing, spacing) + rng.integers(-5, 6, (n_samples - spacing - 1) // spacing)
    spikes[at] = rng.normal(size=len(at))
    trace = np.convolve(spikes, ricker(np.arange(-25, 26) * dt_s, peak_hz=30.0), mode="same")
    return trace / np.sqrt(np.mean(trace**2))


# --------------------------------------------------------------------------- semblance


def test_semblance_against_a_loop():
    # Reference: Neidell & Taner (1971) formula evaluated window by window in a plain loop.
    rng = np.random.default_rng(0)
    gather = rng.normal(size=(5, 60)) + rng.normal(size=60)
    w = 7
    expected = np.empty(60)
    for t in range(60):
        lo, hi = max(t - w // 2, 0), min(t - w // 2 + w, 60)
        window = gather[:, lo:hi]
        expected[t] = np.sum(window.sum(axis=0) ** 2) / (5 * np.sum(window**2))
    np.testing.assert_allclose(semblance(gather, window_samples=w), expected, rtol=1e-12)
    window = gather[:, 10:40]
    expected = np.sum(window.sum(axis=0) ** 2) / (5 * np.sum(window**2))
    assert gather_semblance(gather, start=10, stop=40) == pytest.approx(expected, rel=1e-13)


def test_semblance_of_identical_traces_is_one_and_of_independent_noise_one_over_n():
    rng = np.random.default_rng(1)
    trace = _flat_events(rng, 2000)
    identical = np.tile(trace, (9, 1))
    s = semblance(identical, window_samples=11)
    energetic = np.convolve(trace**2, np.ones(11), mode="same") > 1e-12
    np.testing.assert_allclose(s[energetic], 1.0, rtol=1e-12)
    assert gather_semblance(identical, start=0, stop=2000) == pytest.approx(1.0, rel=1e-13)
    # Independent noise: the cross terms of the stacked power average to zero, so the stack
    # holds N times one trace's power against N^2 in the denominator: semblance 1/N.
    n = 16
    noise = rng.normal(size=(n, 20_000))
    assert np.mean(semblance(noise, window_samples=25)) == pytest.approx(1 / n, rel=0.05)
    assert gather_semblance(noise, start=0, stop=20_000) == pytest.approx(1 / n, rel=0.05)
    assert np.all(semblance(np.zeros((3, 10)), window_samples=3) == 0)


@pytest.mark.parametrize("noise_to_signal", [0.25, 1.0, 4.0])
def test_semblance_and_signal_to_noise_on_signal_plus_noise(noise_to_signal):
    # A flat-event gather: one signal on every trace plus independent noise of known power ratio
    # r = P_n / P_s. The module's relation S = (N + r) / (N (1 + r)), and the S/N it implies, 1/r.
    rng = np.random.default_rng(2)
    n, ns = 12, 40_000
    gather = _flat_events(rng, ns) + np.sqrt(noise_to_signal) * rng.normal(size=(n, ns))
    s = gather_semblance(gather, start=0, stop=ns)
    assert s == pytest.approx((n + noise_to_signal) / (n * (1 + noise_to_signal)), rel=0.02)
    assert signal_to_noise(s, n_traces=n) == pytest.approx(1 / noise_to_signal, rel=0.05)
    # s / (1 - s) is the limit for many traces: with 400 traces it is within 2%
    many = _flat_events(rng, 4_000) + np.sqrt(noise_to_signal) * rng.normal(size=(400, 4_000))
    assert signal_to_noise(gather_semblance(many, start=0, stop=4_000)) == pytest.approx(1 / noise_to_signal, rel=0.03)


def test_signal_to_noise_edges():
    np.testing.assert_allclose(signal_to_noise(np.array([0.0, 0.5, 1.0])), [0.0, 1.0, np.inf])
    # at or below 1/N nothing stands above the noise
    np.testing.assert_allclose(signal_to_noise(np.array([0.05, 0.1, 1.0]), n_traces=10), [0.0, 0.0, np.inf])


def test_grouped_semblance_against_each_gather():
    rng = np.random.default_rng(3)
    traces = rng.normal(size=(40, 80)) + rng.normal(size=80)
    groups = rng.integers(0, 5, 40) * 7
    labels, s, count = grouped_semblance(traces, groups, start=5, stop=70)
    assert labels.tolist() == sorted(set(groups.tolist()))
    for label, value, k in zip(labels, s, count):
        on = groups == label
        assert k == on.sum()
        assert value == pytest.approx(gather_semblance(traces[on], start=5, stop=70), rel=1e-12)


def test_flat_event_synthetic_survey_semblance_before_and_after_correction():
    # NMO-free check on the synthetic survey (tasks.synthetic, scatter, tiny): with an RMS velocity
    # of 1e9 m/s every event is flat, so the traces without station filters are identical within
    # a shot (semblance 1) and shot semblance measures only what the station filters and noise
    # do. Measured in the band, window 0.15-0.9 s: 0.10 with the filters, 0.97 after correcting
    # with the true filters (prewhitening 0.01); with the survey's noise (0.5 RMS) 0.08 -> 0.73
    # (prewhitening 0.3, about the noise-to-signal power ratio 0.25).
    spec = replace(synthetic_spec(size="tiny", scenario="scatter", seed=3), velocity=((0.0, 1e9),))
    tables = stations(spec)
    truth = station_truth(spec, tables)
    g = swath_traces(spec, 1, tables)
    n_fft = correction_n_fft(spec.n_samples, filter_samples=2 * spec.n_filter)
    freqs = sfft.rfftfreq(n_fft, spec.dt_s)
    s, r = station_response(truth, "source", freqs), station_response(truth, "receiver", freqs)
    band = dict(dt_s=spec.dt_s, band_hz=spec.band_hz, taper_hz=5.0)
    window = dict(start=int(spec.window_start_s / spec.dt_s), stop=int(round(spec.window_end_s / spec.dt_s)))

    def shot_semblance(traces):
        return np.median(grouped_semblance(bandpass(traces, **band), g.field_record, **window)[1])

    clean = synthesize(spec, truth, g, station_filters=False, noise=False)
    assert shot_semblance(clean) == pytest.approx(1.0, abs=1e-6)
    distorted = synthesize(spec, truth, g, noise=False)
    f = trace_correction(s, r, g.source_index, g.receiver_index, prewhitening=0.01)
    assert shot_semblance(distorted) < 0.2 and shot_semblance(apply_correction(distorted, f, n_fft=n_fft)) > 0.95
    noisy = synthesize(spec, truth, g)
    f = trace_correction(s, r, g.source_index, g.receiver_index, prewhitening=0.3)
    assert shot_semblance(noisy) < 0.2 and shot_semblance(apply_correction(noisy, f, n_fft=n_fft)) > 0.65


# --------------------------------------------------------------------------- comparisons and spectra


def test_zero_lag_correlation_against_scipy_cosine():
    # Reference: scipy.spatial.distance.cosine, 1 - u.v / (|u| |v|).
    rng = np.random.default_rng(4)
    a, b = rng.normal(size=(6, 50)), rng.normal(size=(6, 50))
    b[1] = 3 * a[1]
    b[2] = -a[2]
    got = zero_lag_correlation(a, b, start=5, stop=45)
    np.testing.assert_allclose(got, [1 - cosine(x[5:45], y[5:45]) for x, y in zip(a, b)], rtol=1e-12)
    assert got[1] == pytest.approx(1.0) and got[2] == pytest.approx(-1.0)
    b[3] = 0.0
    assert zero_lag_correlation(a, b)[3] == 0.0


def test_bandpass_is_zero_phase_and_keeps_the_band():
    dt, ns = 0.004, 500
    t = np.arange(ns) * dt
    # weights: the raised-cosine trapezoid of wavelets.band_taper with corners (lo - taper, lo, hi, hi + taper)
    f = np.linspace(0, 125, 1001)
    expected = band_taper(f, corners_hz=(5, 10, 65, 70))
    np.testing.assert_allclose(band_weights(f, band_hz=(10, 65), taper_hz=5), expected, atol=1e-15)
    assert band_weights(np.array([0.0]), band_hz=(0.0, 40.0), taper_hz=5)[0] == 1.0
    traces = np.stack([np.sin(2 * np.pi * 30 * t), np.sin(2 * np.pi * 100 * t), np.eye(ns)[250]])
    out = bandpass(traces, dt_s=dt, band_hz=(10, 65), taper_hz=5.0)
    middle = slice(100, 400)
    np.testing.assert_allclose(out[0, middle], traces[0, middle], atol=0.02)
    assert np.max(np.abs(out[1, middle])) < 0.02
    np.testing.assert_allclose(out[2, 250 - 100 : 250], out[2, 251 : 351][::-1], atol=1e-12)  # even about the spike
    with pytest.raises(ConfigError, match="band_hz"):
        bandpass(traces, dt_s=dt, band_hz=(65, 10), taper_hz=5.0)


def test_amplitude_spectrum_of_a_sinusoid():
    # numpy.fft convention: a sinusoid of amplitude A on bin k of an n-point rfft gives |X_k| = A n / 2.
    n, dt = 256, 0.004
    t = np.arange(n) * dt
    k = 20
    traces = np.stack([1.5 * np.cos(2 * np.pi * k / (n * dt) * t), 0.5 * np.cos(2 * np.pi * k / (n * dt) * t)])
    freqs, amplitude = amplitude_spectrum(traces, dt_s=dt, n_fft=n)
    assert freqs[k] == pytest.approx(k / (n * dt))
    assert amplitude[k] == pytest.approx(1.0 * n / 2)
    assert np.delete(amplitude, k).max() < 1e-10


def test_cmp_bin_indices_against_floor():
    rng = np.random.default_rng(5)
    x, y = rng.uniform(-100, 400, 200), rng.uniform(-50, 300, 200)
    got = cmp_bin_indices(x, y, bin_m=(6.25, 12.5), origin=(-10.0, 3.0))
    expected = [[math.floor((a + 10.0) / 6.25), math.floor((b - 3.0) / 12.5)] for a, b in zip(x, y)]
    np.testing.assert_array_equal(got, expected)
    assert got.dtype == np.int64
    np.testing.assert_array_equal(cmp_bin_indices([12.5], [12.5], bin_m=12.5, origin=(0, 0)), [[1, 1]])


def test_spacing_adequacy_on_the_synthetic_survey():
    # By hand: 180 m/s over 10-65 Hz gives wavelengths 180/65 = 2.77 m to 180/10 = 18 m; the spatial
    # Nyquist condition (spacing <= wavelength / 2) needs 1.38 m; 12.5 m is unaliased only up to
    # 180 / (2 * 12.5) = 7.2 Hz. Common practice: above about 3-5 m the scattered wavefield is not
    # resolved.
    spec = synthetic_spec(size="tiny")
    got = spacing_adequacy(spec.receiver_interval_m, velocity_mps=spec.near_surface_velocity_mps, band_hz=spec.band_hz)
    assert got["wavelength_min_m"] == pytest.approx(180 / 65) and got["wavelength_max_m"] == pytest.approx(18.0)
    assert got["nyquist_spacing_m"] == pytest.approx(90 / 65)
    assert got["highest_unaliased_hz"] == pytest.approx(7.2)
    assert got["aliased"] and "12.5 m aliases the scattered wavefield" in got["warning"] and "7.2 Hz" in got["warning"]
    assert spec.receiver_interval_m > COMMON_PRACTICE_MAX_SPACING_M[1]
    dense = spacing_adequacy(1.0, velocity_mps=180.0, band_hz=(10.0, 65.0))
    assert not dense["aliased"] and dense["warning"] is None
    assert spacing_adequacy(1.0, velocity_mps=180.0, band_hz=(0.0, 65.0))["wavelength_max_m"] == math.inf
    with pytest.raises(ConfigError, match="station_spacing_m = 0"):
        spacing_adequacy(0.0, velocity_mps=180.0, band_hz=(10.0, 65.0))
