import time
from dataclasses import replace

import numpy as np
import pytest
from scipy.signal import fftconvolve

from descatter.tasks.config import AnalysisConfig
from descatter.tasks.errors import ConfigError
from descatter.tasks.synthetic import (
    TRUTH_KEYS,
    n_traces_per_swath,
    reflection_traveltime,
    rms_velocity,
    station_response,
    station_truth,
    stations,
    swath_traces,
    synthesize,
    synthetic_spec,
    truth_arrays,
)
from descatter.tasks.wavelets import fractional_delay_spike


@pytest.fixture(scope="module")
def scatter():
    spec = synthetic_spec(size="tiny", scenario="scatter", seed=3)
    tables = stations(spec)
    return spec, tables, station_truth(spec, tables)


@pytest.fixture(scope="module")
def statics():
    spec = synthetic_spec(size="tiny", scenario="statics", seed=5)
    tables = stations(spec)
    return spec, tables, station_truth(spec, tables)


def _trace_pair(geometry, index):
    return int(geometry.source_index[index]), int(geometry.receiver_index[index])


# --------------------------------------------------------------------------- sizes and geometry


def test_preset_sizes():
    tiny = synthetic_spec(size="tiny")
    assert sum(n_traces_per_swath(tiny)) == 2304 and tiny.n_swaths == 3
    assert tiny.n_samples * tiny.dt_s == pytest.approx(1.0)
    demo = synthetic_spec(size="demo")
    assert sum(n_traces_per_swath(demo)) == 28_800 and demo.n_swaths == 5
    large = synthetic_spec(size="large")
    assert 200_000 < sum(n_traces_per_swath(large)) < 400_000
    assert synthetic_spec(size="tiny", n_swaths=5).n_swaths == 5


@pytest.mark.parametrize("n", [3_000, 20_000, 150_000])
def test_n_traces_scales_the_grid(n):
    got = sum(n_traces_per_swath(synthetic_spec(n_traces=n)))
    assert abs(got - n) <= 0.15 * n


def test_bad_requests_say_what_was_expected():
    with pytest.raises(ValueError, match="size = 'huge'.*tiny, demo, large"):
        synthetic_spec(size="huge")
    with pytest.raises(ValueError, match="scenario = 'ground roll'"):
        synthetic_spec(scenario="ground roll")
    with pytest.raises(ConfigError, match="n_traces = 10 is too small"):
        synthetic_spec(n_traces=10)


def test_orthogonal_geometry(scatter):
    spec, tables, _ = scatter
    src, rcv = tables.sources, tables.receivers
    for line in np.unique(rcv.line):  # receiver lines run along x
        on = rcv.line == line
        assert np.ptp(rcv.y[on]) == 0 and np.allclose(np.diff(rcv.x[on]), spec.receiver_interval_m)
    for swath in range(spec.n_swaths):  # source lines run along y
        on = src.swath == swath
        assert np.ptp(src.x[on]) == 0 and np.allclose(np.diff(src.y[on]), spec.source_interval_m)
        assert np.all(src.line[on] == swath + 1)
    assert rcv.x.min() > 400_000 and rcv.y.min() > 6_000_000
    assert np.ptp(rcv.elevation) < 20 and src.x.dtype == np.float64 and src.line.dtype == np.int32
    settings = AnalysisConfig(**spec.analysis_settings())
    assert settings.window_end_s <= spec.n_samples * spec.dt_s


def test_trace_headers_of_the_survey(scatter):
    spec, tables, _ = scatter
    swaths = [swath_traces(spec, s, tables) for s in range(spec.n_swaths)]
    assert [len(g) for g in swaths] == n_traces_per_swath(spec)
    records = np.concatenate([g.field_record for g in swaths])
    assert len(np.unique(records)) == spec.n_swaths * spec.shots_per_line
    for g in swaths:
        for record in np.unique(g.field_record):
            on = g.field_record == record
            assert np.array_equal(g.channel[on], np.arange(1, on.sum() + 1))
            assert len(np.unique(g.source_index[on])) == 1
        np.testing.assert_allclose(g.offset, np.hypot(g.source_x - g.receiver_x, g.source_y - g.receiver_y))
        assert np.array_equal(g.energy_source_point, tables.sources.number[g.source_index])


def test_max_offset_patch():
    spec = synthetic_spec(size="large")
    tables = stations(spec)
    g = swath_traces(spec, 1, tables)
    assert g.offset.max() <= spec.max_offset_m + 1e-6
    assert len(np.unique(g.receiver_index)) < len(tables.receivers)
    live = np.zeros(len(tables.receivers), dtype=bool)
    for s in range(spec.n_swaths):
        live[swath_traces(spec, s, tables).receiver_index] = True
    assert live.all()  # every listed receiver is recorded by some shot


# --------------------------------------------------------------------------- truth


def test_generation_is_deterministic_and_fast():
    start = time.perf_counter()
    spec = synthetic_spec(size="tiny")
    tables = stations(spec)
    truth = station_truth(spec, tables)
    data = [synthesize(spec, truth, swath_traces(spec, s, tables)) for s in range(spec.n_swaths)]
    assert time.perf_counter() - start < 2.0
    again = synthesize(spec, station_truth(spec), swath_traces(spec, 1))
    assert np.array_equal(again, data[1]) and again.dtype == np.float32
    other = synthetic_spec(size="tiny", seed=1)
    assert not np.array_equal(synthesize(other, station_truth(other), swath_traces(other, 1)), data[1])


def test_block_boundaries_do_not_change_samples():
    spec = synthetic_spec(size="demo", seed=2)
    truth = station_truth(spec)
    g = swath_traces(spec, 1)[:1000]
    whole = synthesize(spec, truth, g)
    assert np.array_equal(np.concatenate([synthesize(spec, truth, g[:500]), synthesize(spec, truth, g[500:])]), whole)
    picked = np.random.default_rng(0).permutation(1000)[:37]
    assert np.array_equal(synthesize(spec, truth, g[picked]), whole[picked])
    by_index = synthesize(spec, truth, g.source_index[:300], g.receiver_index[:300])
    assert np.array_equal(by_index, whole[:300])  # station rows alone give the same traces


def test_zero_mean_gauge(scatter, statics):
    for _, _, truth in (scatter, statics):
        for kind in ("source", "receiver"):
            filters = truth.of(kind)
            assert abs(filters.static_s.mean()) < 1e-15
            assert abs(filters.log_amplitude.mean()) < 1e-15
            assert 0.001 < filters.static_s.std() < 0.015  # a few ms
            assert np.all(np.abs(filters.static_s) < -truth.filter_t0_s)


def test_scattering_fraction_is_coda_energy_over_filter_energy(scatter, statics):
    spec, _, truth = scatter
    for kind in ("source", "receiver"):
        filters = truth.of(kind)
        # Independent split: the direct arrival is the projection of the filter on a Kaiser-windowed
        # sinc spike at the true static (the module's coda is orthogonal to it); the coda is the rest.
        n = np.arange(spec.n_filter)
        u = n[None, :] - (spec.filter_lead_samples + filters.static_s[:, None] / spec.dt_s)
        h, beta = spec.spike_half_width, spec.spike_kaiser_beta
        spike = np.where(np.abs(u) <= h, np.sinc(u) * np.i0(beta * np.sqrt(np.clip(1 - (u / h) ** 2, 0, 1))) / np.i0(beta), 0)
        direct = (np.sum(filters.filter * spike, axis=1) / np.sum(spike**2, axis=1))[:, None] * spike
        coda = filters.filter - direct
        fraction = np.sum(coda**2, axis=1) / np.sum(filters.filter**2, axis=1)
        np.testing.assert_allclose(filters.scattering_fraction, fraction, atol=1e-12)
        # the coda follows the direct arrival: nothing before it, beyond the spike's own width
        first = np.argmax(np.abs(coda) > 1e-12, axis=1)
        assert np.all(first >= np.floor(spec.filter_lead_samples + filters.static_s / spec.dt_s) - h)
    receivers = truth.receivers.scattering_fraction
    assert receivers.max() > 0.85 and receivers.min() < 0.5
    sources = truth.sources.scattering_fraction
    assert sources.max() > 0.8 and sources.min() < 0.5
    assert np.all(statics[2].sources.scattering_fraction == 0) and np.all(statics[2].receivers.scattering_fraction == 0)


def test_scattering_zone_is_smooth_in_space(scatter):
    _, tables, truth = scatter
    rcv, phi = tables.receivers, truth.receivers.scattering_fraction
    near = np.hypot(rcv.x[:, None] - rcv.x[None, :], rcv.y[:, None] - rcv.y[None, :]) < 30
    np.fill_diagonal(near, False)
    neighbours = (near @ phi) / near.sum(axis=1)
    assert np.corrcoef(phi, neighbours)[0, 1] > 0.5


def test_truth_arrays_cover_truth_keys(scatter):
    spec, tables, truth = scatter
    arrays = truth_arrays(spec, truth, tables)
    assert set(arrays) == set(TRUTH_KEYS) - {"clean"}
    assert all(a.dtype != object for a in arrays.values())
    assert arrays["source_filter"].shape == (len(tables.sources), spec.n_filter)
    assert arrays["filter_t0_s"] == pytest.approx(-spec.filter_lead_s)
    np.testing.assert_array_equal(arrays["velocity_vrms_mps"], [v for _, v in spec.velocity])


# --------------------------------------------------------------------------- the signal model


def test_nmo_traveltime_handbook_value():
    # Hyperbolic NMO equation t^2 = t0^2 + x^2 / v^2 (Yilmaz 2001, Seismic Data Analysis, ch. 3):
    # t0 = 1 s, x = 1000 m, v = 2000 m/s gives sqrt(1.25) = 1.118034 s.
    assert reflection_traveltime(1000.0, t0_s=1.0, vrms_mps=2000.0) == pytest.approx(1.118034, abs=5e-7)
    assert rms_velocity(np.array([0.3]), velocity=((0.0, 1600.0), (0.6, 2200.0)))[0] == pytest.approx(1900.0)


def test_clean_trace_peaks_at_the_nmo_time(scatter):
    spec, tables, truth = scatter
    one = replace(spec, velocity=((0.0, 2000.0),), reflectors=((1.0, 1.0),), n_samples=400)
    g = replace(swath_traces(one, 0, tables)[:3], offset=np.array([0.0, 600.0, 1000.0]))
    clean = synthesize(one, truth, g, station_filters=False, noise=False).astype(np.float64)
    up = 32  # band-limited interpolation by zero padding the spectrum (numpy.fft)
    fine = np.fft.irfft(np.fft.rfft(clean, axis=1), up * one.n_samples, axis=1) * up
    peak = np.argmax(fine, axis=1) * one.dt_s / up
    np.testing.assert_allclose(peak, [1.0, np.sqrt(1 + 0.09), 1.118034], atol=2e-4)
    np.testing.assert_allclose(fine.max(axis=1), 1.0, atol=2e-3)


def test_statics_scenario_is_a_shifted_scaled_clean_trace(statics):
    spec, tables, truth = statics
    g = swath_traces(spec, 2, tables)[[5, 300, 700]]
    data = synthesize(spec, truth, g, noise=False).astype(np.float64)
    longer = replace(spec, n_samples=spec.n_samples + 40)
    clean = synthesize(longer, truth, g, station_filters=False, noise=False).astype(np.float64)
    for k in range(len(g)):
        i, j = _trace_pair(g, k)
        shift = truth.sources.static_s[i] + truth.receivers.static_s[j]
        scale = np.exp(truth.sources.log_amplitude[i] + truth.receivers.log_amplitude[j])
        # Reference: shift theorem with numpy.fft, x(t - tau) <-> X(f) exp(-2 pi i f tau).
        n_fft = 1024
        f = np.fft.rfftfreq(n_fft, spec.dt_s)
        shifted = np.fft.irfft(np.fft.rfft(clean[k], n_fft) * np.exp(-2j * np.pi * f * shift), n_fft)
        expected = scale * shifted[: spec.n_samples]
        np.testing.assert_allclose(data[k], expected, atol=3e-4 * np.abs(expected).max())


def test_convolution_model_against_fftconvolve(scatter):
    spec, tables, truth = scatter
    g = swath_traces(spec, 0, tables)[[17, 400]]
    data = synthesize(spec, truth, g, noise=False).astype(np.float64)
    lead = spec.filter_lead_samples
    longer = replace(spec, n_samples=spec.n_samples + 2 * lead + 40)
    clean = synthesize(longer, truth, g, station_filters=False, noise=False).astype(np.float64)
    for k in range(len(g)):
        i, j = _trace_pair(g, k)
        # Reference: scipy.signal.fftconvolve of the clean trace with both station filters; the
        # filters start at filter_t0_s = -lead * dt, so the product starts 2 * lead samples early.
        full = fftconvolve(fftconvolve(clean[k], truth.sources.filter[i]), truth.receivers.filter[j])
        expected = full[2 * lead : 2 * lead + spec.n_samples]
        np.testing.assert_allclose(data[k], expected, atol=1e-5 * np.abs(expected).max())


def test_traces_sharing_a_receiver_carry_its_filter(scatter):
    spec, tables, truth = scatter
    long = replace(spec, n_samples=700)  # every event and its filter tails inside the trace
    receiver = 37
    g = [swath_traces(long, s, tables) for s in (0, 2)]
    picked = [geom[np.flatnonzero(geom.receiver_index == receiver)[3]] for geom in g]
    f = np.fft.rfftfreq(long.n_samples, long.dt_s)
    r = station_response(truth, "receiver", f)[receiver]
    estimates = []
    for geom in picked:
        data = np.fft.rfft(synthesize(long, truth, geom, noise=False)[0].astype(np.float64))
        clean = np.fft.rfft(synthesize(long, truth, geom, station_filters=False, noise=False)[0].astype(np.float64))
        s = truth.response("source", f)[geom.source_index[0]]
        # D = S R E on noise-free data (numpy.fft spectra)
        np.testing.assert_allclose(data, s * r * clean, atol=2e-4 * np.abs(data).max())
        usable = np.abs(s * clean) > 0.2 * np.abs(s * clean).max()
        estimates.append((data / (s * clean))[usable] / r[usable])
    for ratio in estimates:
        np.testing.assert_allclose(ratio, 1.0, atol=5e-3)


def test_noise_level_is_relative_to_the_trace(scatter):
    spec, tables, truth = scatter
    g = swath_traces(spec, 1, tables)[:200]
    noisy = synthesize(spec, truth, g).astype(np.float64)
    quiet = synthesize(spec, truth, g, noise=False).astype(np.float64)
    ratio = np.sqrt(np.mean((noisy - quiet) ** 2, axis=1) / np.mean(quiet**2, axis=1))
    np.testing.assert_allclose(ratio, spec.noise_level, rtol=1e-4)
    spectrum = np.abs(np.fft.rfft(noisy - quiet, axis=1)).mean(axis=0)
    f = np.fft.rfftfreq(spec.n_samples, spec.dt_s)
    assert spectrum[f > 100].max() < 0.01 * spectrum.max()  # band-limited


def test_filter_spike_matches_wavelets_module(statics):
    spec, _, truth = statics
    spike = fractional_delay_spike(spec.n_filter, delay_samples=spec.filter_lead_samples + truth.sources.static_s / spec.dt_s,
                                   half_width=spec.spike_half_width, kaiser_beta=spec.spike_kaiser_beta)
    np.testing.assert_allclose(truth.sources.filter, np.exp(truth.sources.log_amplitude)[:, None] * spike, atol=1e-15)
