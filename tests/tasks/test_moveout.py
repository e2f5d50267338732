"""Moveout kernels against the handbook NMO equation and a per-trace np.interp loop."""

from __future__ import annotations

import numpy as np
import pytest

from descatter.tasks import moveout
from descatter.tasks.errors import ConfigError
from descatter.tasks.moveout import (
    lmo_correct,
    nmo_correct,
    nmo_times,
    rms_velocity_at,
    taper_at,
    window_samples,
    window_taper,
)
from descatter.tasks.wavelets import ricker

VT, VV = [0.0, 1.0, 2.0], [1600.0, 2200.0, 3000.0]


def _reference_resample(traces, times, delay_s, dt_s, keep=None):
    """Deliberately simple: np.interp per trace on the samples extended by one zero each side."""
    n, ns = traces.shape
    out = np.zeros(times.shape, np.float64)
    for i in range(n):
        tx = delay_s[i] + dt_s * np.arange(-1, ns + 1)
        fx = np.concatenate([[0.0], traces[i].astype(np.float64), [0.0]])
        out[i] = np.interp(times[i], tx, fx, left=0.0, right=0.0)
    if keep is not None:
        out[~keep] = 0.0
    return out


def test_rms_velocity_linear_and_constant_beyond_ends():
    t = np.array([-1.0, 0.0, 0.5, 1.0, 1.5, 2.0, 9.0])
    v = rms_velocity_at(t, velocity_t0_s=VT, velocity_vrms_mps=VV)
    np.testing.assert_allclose(v, [1600, 1600, 1900, 2200, 2600, 3000, 3000])
    assert rms_velocity_at(0.3, velocity_t0_s=[0.0], velocity_vrms_mps=[1500.0]) == 1500.0
    with pytest.raises(ConfigError, match="increase"):
        rms_velocity_at(0.3, velocity_t0_s=[1.0, 0.5], velocity_vrms_mps=[1500.0, 1600.0])
    with pytest.raises(ConfigError, match="positive"):
        rms_velocity_at(0.3, velocity_t0_s=[0.0, 1.0], velocity_vrms_mps=[1500.0, 0.0])


def test_nmo_times_handbook_value():
    # hyperbolic NMO equation t^2 = t0^2 + x^2 / v^2 (Yilmaz 2001, Seismic Data Analysis, ch. 3):
    # t0 = 1 s, x = 1000 m, V = 2000 m/s gives sqrt(1.25) = 1.118034 s
    t = nmo_times([1.0], [1000.0], velocity_t0_s=[0.0], velocity_vrms_mps=[2000.0])
    assert t.shape == (1, 1)
    assert t[0, 0] == pytest.approx(1.118034, abs=1e-6)
    # zero offset is the identity, the sign of the offset is ignored
    t = nmo_times([0.2, 0.7], [0.0, -800.0, 800.0], velocity_t0_s=VT, velocity_vrms_mps=VV)
    np.testing.assert_allclose(t[0], [0.2, 0.7])
    np.testing.assert_array_equal(t[1], t[2])


@pytest.mark.parametrize("block_samples", [1 << 16, 1000])
def test_nmo_correct_matches_interp_loop_with_delays_and_mute(block_samples, monkeypatch):
    monkeypatch.setattr(moveout, "_BLOCK_SAMPLES", block_samples)  # one block, or blocks of 3 traces
    rng = np.random.default_rng(1)
    n, ns, dt = 37, 300, 0.004
    traces = rng.standard_normal((n, ns)).astype(np.float32)
    offset = rng.uniform(-1500, 1500, n)
    delay = rng.choice([0.0, 0.012, -0.008, 0.1], n)
    got = nmo_correct(traces, offset_m=offset, delay_s=delay, dt_s=dt, velocity_t0_s=VT,
                      velocity_vrms_mps=VV, stretch_mute=0.5)
    assert got.dtype == np.float32 and got.shape == (n, ns)
    t0 = dt * np.arange(ns)
    t = nmo_times(t0, offset, velocity_t0_s=VT, velocity_vrms_mps=VV)
    with np.errstate(divide="ignore", invalid="ignore"):
        keep = ~((t - t0) > 0.5 * t0)
    want = _reference_resample(traces, t, delay, dt, keep)
    # float32 positions and arithmetic: within a few 1e-4 of unit-variance samples
    np.testing.assert_allclose(got, want, atol=2e-3)
    # muted samples are exactly zero; at t0 = 0 any offset is infinitely stretched
    assert np.all(got[~keep] == 0)
    assert np.all(got[offset != 0, 0] == 0)
    assert keep.mean() > 0.5


def test_nmo_flattens_a_hyperbolic_event():
    # a Ricker reflection on its hyperbola comes out at t0 for every offset
    n, ns, dt, t_event = 12, 500, 0.002, 0.6
    offset = np.linspace(0, 900, n)
    delay = np.linspace(0.0, 0.05, n)
    v = rms_velocity_at(t_event, velocity_t0_s=VT, velocity_vrms_mps=VV)
    t_hyp = np.sqrt(t_event**2 + (offset / v) ** 2)
    times = delay[:, None] + dt * np.arange(ns)
    traces = ricker(times - t_hyp[:, None], peak_hz=25.0).astype(np.float32)
    out = nmo_correct(traces, offset_m=offset, delay_s=delay, dt_s=dt, velocity_t0_s=VT,
                      velocity_vrms_mps=VV, stretch_mute=None)
    peak = np.argmax(out, axis=1) * dt
    np.testing.assert_allclose(peak, t_event, atol=dt)
    # sub-sample peak by a parabola through the three samples around the maximum
    k = np.argmax(out, axis=1)
    y0, y1, y2 = (out[np.arange(n), k + s] for s in (-1, 0, 1))
    refined = (k + 0.5 * (y0 - y2) / (y0 - 2 * y1 + y2)) * dt
    # the three-point parabola is biased on a stretched wavelet by up to about a tenth of a sample
    np.testing.assert_allclose(refined, t_event, atol=0.15 * dt)


def test_nmo_stretch_mute_threshold():
    # one trace: samples with (t - t0) / t0 just below the limit kept, just above muted
    ns, dt, x = 400, 0.004, 1200.0
    traces = np.ones((1, ns), np.float32)
    t0 = dt * np.arange(ns)
    t = nmo_times(t0, [x], velocity_t0_s=[0.0], velocity_vrms_mps=[2000.0])[0]
    for mute in (0.1, 0.3, 1.0):
        out = nmo_correct(traces, offset_m=[x], delay_s=0.0, dt_s=dt, velocity_t0_s=[0.0],
                          velocity_vrms_mps=[2000.0], stretch_mute=mute)[0]
        stretch = np.divide(t - t0, t0, out=np.full(ns, np.inf), where=t0 > 0)
        inside = t <= (ns - 1) * dt
        np.testing.assert_array_equal(out[(stretch > mute * 1.001)], 0.0)
        np.testing.assert_allclose(out[(stretch < mute * 0.999) & inside], 1.0, atol=1e-6)
    with pytest.raises(ConfigError, match="stretch_mute"):
        nmo_correct(traces, offset_m=[x], delay_s=0.0, dt_s=dt, velocity_t0_s=[0.0],
                    velocity_vrms_mps=[2000.0], stretch_mute=-0.1)


def test_dead_and_zero_extended_edges():
    ns, dt = 50, 0.004
    traces = np.zeros((3, ns), np.float32)
    traces[1] = 1.0
    out = nmo_correct(traces, offset_m=[0, 0, 0], delay_s=[0.0, 0.01, 0.0], dt_s=dt,
                      velocity_t0_s=[0.0], velocity_vrms_mps=[2000.0], stretch_mute=0.5)
    assert np.all(out[0] == 0) and np.all(out[2] == 0)
    # delay 10 ms: t0 = 0, 4, 8 ms lie before the first sample (2.5, 1.5, 0.5 samples): 0, 0, ramp 0.5
    np.testing.assert_allclose(out[1, :4], [0.0, 0.0, 0.5, 1.0], atol=1e-6)


def test_lmo_correct_matches_interp_loop_and_flattens():
    rng = np.random.default_rng(2)
    n, ns, dt, v = 20, 250, 0.004, 1800.0
    traces = rng.standard_normal((n, ns)).astype(np.float32)
    offset = rng.uniform(-700, 700, n)
    delay = rng.choice([0.0, 0.02], n)
    got = lmo_correct(traces, offset_m=offset, delay_s=delay, dt_s=dt, velocity_mps=v, intercept_s=-0.05)
    t = dt * np.arange(ns) - 0.05 + np.abs(offset)[:, None] / v
    # float32 positions: about 1e-5 of a sample at index 250, times the local slope of white noise
    np.testing.assert_allclose(got, _reference_resample(traces, t, delay, dt), atol=1e-4)
    # an arrival on t = 0.1 + |x| / v lands at t0 = 0.1 - intercept = 0.15
    times = delay[:, None] + dt * np.arange(ns)
    arrivals = ricker(times - (0.1 + np.abs(offset) / v)[:, None], peak_hz=20.0).astype(np.float32)
    flat = lmo_correct(arrivals, offset_m=offset, delay_s=delay, dt_s=dt, velocity_mps=v, intercept_s=-0.05)
    np.testing.assert_allclose(np.argmax(flat, axis=1) * dt, 0.15, atol=dt)
    with pytest.raises(ConfigError, match="LMO velocity"):
        lmo_correct(traces, offset_m=offset, delay_s=0.0, dt_s=dt, velocity_mps=0.0)


def test_window_taper_shape():
    dt = 0.005
    w = window_taper(300, dt_s=dt, start_s=0.2, end_s=0.8, taper_s=0.1)
    t = dt * np.arange(300)
    assert w.dtype == np.float64 and w.shape == (300,)
    assert np.all(w[t < 0.2 - 1e-9] == 0) and np.all(w[t > 0.8 + 1e-9] == 0)
    np.testing.assert_allclose(w[(t >= 0.3) & (t <= 0.7)], 1.0)
    # raised cosine: half weight in the middle of each flank, symmetric about the centre
    assert w[np.argmin(np.abs(t - 0.25))] == pytest.approx(0.5, abs=1e-9)
    assert w[np.argmin(np.abs(t - 0.75))] == pytest.approx(0.5, abs=1e-9)
    np.testing.assert_allclose(w[40:161], w[40:161][::-1], atol=1e-12)
    box = window_taper(300, dt_s=dt, start_s=0.2, end_s=0.8, taper_s=0.0)
    assert box.sum() == 121 and box[40] == 1 and box[160] == 1
    np.testing.assert_allclose(taper_at(t, start_s=0.2, end_s=0.8, taper_s=0.1), w)
    assert window_samples(dt_s=dt, start_s=0.2, end_s=0.8) == (40, 121)
    for bad in (dict(start_s=0.5, end_s=0.4, taper_s=0.0), dict(start_s=0.2, end_s=0.4, taper_s=0.15),
                dict(start_s=-0.1, end_s=0.4, taper_s=0.0)):
        with pytest.raises(ConfigError):
            window_taper(300, dt_s=dt, **bad)


def test_per_trace_lengths_checked():
    traces = np.zeros((4, 20), np.float32)
    with pytest.raises(ConfigError, match="offset_m"):
        nmo_correct(traces, offset_m=[1.0, 2.0], delay_s=0.0, dt_s=0.004, velocity_t0_s=[0.0],
                    velocity_vrms_mps=[2000.0], stretch_mute=None)
    with pytest.raises(ConfigError, match="dt_s"):
        lmo_correct(traces, offset_m=0.0, delay_s=0.0, dt_s=0.0, velocity_mps=1000.0)
