"""Windowed spectra against a dense DFT of the corrected, tapered traces (numpy as reference)."""

from __future__ import annotations

import numpy as np
import pytest

from descatter.tasks.errors import ConfigError
from descatter.tasks.moveout import lmo_correct, nmo_correct, window_taper
from descatter.tasks.spectra import band_frequencies, windowed_spectra
from descatter.tasks.wavelets import fractional_delay_spike

VT, VV = [0.0, 1.0, 2.0], [1600.0, 2200.0, 3000.0]
DT = 0.004


def _dense_dft(y, freqs, dt):
    """D(f) = sum_k y[k] exp(-2 pi i f k dt), the module's definition, as a matrix product."""
    k = np.arange(y.shape[1])
    return y.astype(np.float64) @ np.exp(-2j * np.pi * np.outer(k * dt, freqs))


def _chunk(seed=0, n=40, ns=250):
    rng = np.random.default_rng(seed)
    traces = rng.standard_normal((n, ns)).astype(np.float32)
    offset = rng.uniform(0, 1200, n)
    delay = rng.choice([0.0, 0.008, 0.02], n)
    return traces, offset, delay


def test_band_frequencies_against_numpy_rfftfreq():
    freqs, index = band_frequencies(n_fft=250, dt_s=DT, band_hz=(10.0, 65.0))
    all_f = np.fft.rfftfreq(250, DT)  # numpy.fft as the reference bin frequencies
    np.testing.assert_allclose(freqs, all_f[index])
    assert index.dtype == np.int64 and freqs.dtype == np.float64
    # 1 Hz bins: both band edges are bins and are included
    assert freqs[0] == pytest.approx(10.0) and freqs[-1] == pytest.approx(65.0) and len(freqs) == 56
    assert np.all(np.diff(index) == 1)
    with pytest.raises(ConfigError, match="no bin"):
        band_frequencies(n_fft=16, dt_s=DT, band_hz=(1.0, 2.0))
    with pytest.raises(ConfigError, match="Nyquist"):
        band_frequencies(n_fft=256, dt_s=DT, band_hz=(10.0, 200.0))


@pytest.mark.parametrize("n_fft", [192, 256])
def test_nmo_spectra_equal_dense_dft_of_corrected_tapered_traces(n_fft):
    # window 0.2-0.9 s = samples 50..225; n_fft 192 holds the window but not its end time,
    # so the phase ramp must put the window back at its t0
    traces, offset, delay = _chunk()
    args = dict(offset_m=offset, delay_s=delay, dt_s=DT, velocity_t0_s=VT, velocity_vrms_mps=VV)
    got = windowed_spectra(traces, **args, window_s=(0.2, 0.9), taper_s=0.05, stretch_mute=0.5,
                           n_fft=n_fft, band_hz=(8.0, 70.0))
    freqs, _ = band_frequencies(n_fft=n_fft, dt_s=DT, band_hz=(8.0, 70.0))
    corrected = nmo_correct(traces, **args, stretch_mute=0.5)
    tapered = corrected * window_taper(traces.shape[1], dt_s=DT, start_s=0.2, end_s=0.9, taper_s=0.05)
    want = _dense_dft(tapered, freqs, DT)
    assert got.dtype == np.complex64 and got.shape == (len(traces), len(freqs))
    # complex64 FFT of unit-variance samples: relative error about 1e-6 of the spectrum's scale
    scale = np.abs(want).max()
    np.testing.assert_allclose(got, want, atol=2e-5 * scale)


def test_full_length_window_equals_numpy_rfft():
    traces, offset, delay = _chunk(seed=3, ns=200)
    got = windowed_spectra(traces, offset_m=offset, delay_s=delay, dt_s=DT, velocity_t0_s=VT,
                           velocity_vrms_mps=VV, window_s=(0.0, 0.796), taper_s=0.0, stretch_mute=None,
                           n_fft=256, band_hz=(0.0, 125.0))
    corrected = nmo_correct(traces, offset_m=offset, delay_s=delay, dt_s=DT, velocity_t0_s=VT,
                            velocity_vrms_mps=VV, stretch_mute=None)
    want = np.fft.rfft(corrected.astype(np.float64), n=256, axis=-1)  # numpy.fft as reference
    np.testing.assert_allclose(got, want, atol=2e-5 * np.abs(want).max())


@pytest.mark.parametrize("record_delay", [0.0, 0.1])
def test_pure_delay_has_linear_phase(record_delay):
    # a zero-offset band-limited spike at 0.4637 s (absolute time) shows the phase -2 pi f tau
    # whatever the record's delay recording time
    ns, tau = 300, 0.4637
    spike = fractional_delay_spike(ns, delay_samples=(tau - record_delay) / DT, half_width=8, kaiser_beta=8.0)
    traces = spike[None, :].astype(np.float32)
    d = windowed_spectra(traces, offset_m=[0.0], delay_s=record_delay, dt_s=DT, velocity_t0_s=VT,
                         velocity_vrms_mps=VV, window_s=(0.25, 0.75), taper_s=0.05, stretch_mute=0.5,
                         n_fft=256, band_hz=(10.0, 65.0))[0]
    freqs, _ = band_frequencies(n_fft=256, dt_s=DT, band_hz=(10.0, 65.0))
    residual = np.angle(d * np.exp(2j * np.pi * freqs * tau))
    # the Kaiser-windowed sinc has a flat response over this band (ripple well below 1e-2 rad)
    assert np.abs(residual).max() < 1e-2
    np.testing.assert_allclose(np.abs(d), 1.0, atol=2e-2)


def test_dead_traces_give_zeros():
    traces, offset, delay = _chunk(seed=4, n=6)
    traces[[1, 4]] = 0.0
    d = windowed_spectra(traces, offset_m=offset, delay_s=delay, dt_s=DT, velocity_t0_s=VT,
                         velocity_vrms_mps=VV, window_s=(0.2, 0.9), taper_s=0.05, stretch_mute=0.5,
                         n_fft=256, band_hz=(10.0, 65.0))
    assert np.all(d[[1, 4]] == 0)
    assert np.all(np.abs(d[[0, 2, 3, 5]]).max(axis=1) > 0)


def test_lmo_spectra_equal_dense_dft():
    traces, offset, delay = _chunk(seed=5)
    got = windowed_spectra(traces, offset_m=offset, delay_s=delay, dt_s=DT, window_s=(0.0, 0.3),
                           taper_s=0.03, stretch_mute=None, n_fft=128, band_hz=(10.0, 65.0),
                           moveout="lmo", lmo_velocity_mps=1800.0, lmo_intercept_s=-0.02)
    freqs, _ = band_frequencies(n_fft=128, dt_s=DT, band_hz=(10.0, 65.0))
    corrected = lmo_correct(traces, offset_m=offset, delay_s=delay, dt_s=DT, velocity_mps=1800.0,
                            intercept_s=-0.02)
    tapered = corrected * window_taper(traces.shape[1], dt_s=DT, start_s=0.0, end_s=0.3, taper_s=0.03)
    want = _dense_dft(tapered, freqs, DT)
    np.testing.assert_allclose(got, want, atol=2e-5 * np.abs(want).max())


def test_parameter_errors_say_what_to_do():
    traces, offset, delay = _chunk(n=3)
    args = dict(offset_m=offset, delay_s=delay, dt_s=DT, velocity_t0_s=VT, velocity_vrms_mps=VV,
                taper_s=0.05, stretch_mute=0.5, band_hz=(10.0, 65.0))
    with pytest.raises(ConfigError, match="next_fast_len"):
        windowed_spectra(traces, **args, window_s=(0.2, 0.9), n_fft=128)
    with pytest.raises(ConfigError, match="moveout"):
        windowed_spectra(traces, **args, window_s=(0.2, 0.9), n_fft=256, moveout="dmo")
    with pytest.raises(ConfigError, match="lmo_velocity_mps"):
        windowed_spectra(traces, **args, window_s=(0.2, 0.9), n_fft=256, moveout="lmo")
    with pytest.raises(ConfigError, match="velocity_t0_s"):
        windowed_spectra(traces, offset_m=offset, delay_s=delay, dt_s=DT, taper_s=0.05, stretch_mute=0.5,
                         band_hz=(10.0, 65.0), window_s=(0.2, 0.9), n_fft=256)
