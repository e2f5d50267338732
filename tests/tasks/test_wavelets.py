import numpy as np
import pytest

from descatter.tasks.wavelets import band_taper, fractional_delay_spike, ricker, ricker_spectrum


def test_ricker_unit_peak_and_side_lobes():
    # Ricker wavelet w(t) = (1 - 2 pi^2 f^2 t^2) exp(-pi^2 f^2 t^2); side-lobe minima
    # -2 exp(-3/2) at t = +-sqrt(3/2) / (pi f) (Ryan 1994, CSEG Recorder; SubSurfWiki "Ricker wavelet").
    fp = 25.0
    assert ricker(np.array([0.0]), peak_hz=fp)[0] == 1.0
    t = np.linspace(-0.1, 0.1, 200_001)
    w = ricker(t, peak_hz=fp)
    assert t[np.argmax(w)] == pytest.approx(0.0, abs=1e-6)
    np.testing.assert_allclose(w, w[::-1], atol=1e-15)
    t_min = np.sqrt(1.5) / (np.pi * fp)
    np.testing.assert_allclose(ricker(np.array([-t_min, t_min]), peak_hz=fp), -2 * np.exp(-1.5), rtol=1e-12)
    assert w.min() == pytest.approx(-2 * np.exp(-1.5), rel=1e-8)
    assert abs(t[np.argmin(w)]) == pytest.approx(t_min, abs=2e-6)


def test_ricker_spectrum_peaks_at_peak_frequency():
    # Ricker amplitude spectrum (2/sqrt(pi)) f^2 / fp^3 exp(-f^2 / fp^2) (Ryan 1994):
    # d/df [f^2 exp(-f^2/fp^2)] = 0 at f = fp, where it is 2 / (sqrt(pi) e fp).
    for fp in (12.0, 30.0, 47.5):
        f = np.linspace(0.0, 5 * fp, 500_001)
        spectrum = ricker_spectrum(f, peak_hz=fp)
        assert f[np.argmax(spectrum)] == pytest.approx(fp, abs=1e-3 * fp)
        assert spectrum.max() == pytest.approx(2 / (np.sqrt(np.pi) * np.e * fp), rel=1e-9)
        assert ricker_spectrum(np.array([0.0]), peak_hz=fp)[0] == 0.0


def test_ricker_spectrum_is_the_transform_of_ricker():
    # Reference: numpy.fft of the sampled wavelet, times dt, approximates the continuous transform.
    fp, dt, n = 30.0, 0.001, 4096
    t = (np.arange(n) - n // 2) * dt
    sampled = np.fft.rfft(np.fft.ifftshift(ricker(t, peak_hz=fp))) * dt
    f = np.fft.rfftfreq(n, dt)
    np.testing.assert_allclose(sampled.real, ricker_spectrum(f, peak_hz=fp), atol=1e-12)
    np.testing.assert_allclose(sampled.imag, 0.0, atol=1e-12)


def test_fractional_delay_spike_integer_and_fractional():
    spike = fractional_delay_spike(32, delay_samples=np.array([10.0]), half_width=8, kaiser_beta=8.0)[0]
    expected = np.zeros(32)
    expected[10] = 1.0
    np.testing.assert_allclose(spike, expected, atol=1e-15)

    # A delay of c samples has spectrum exp(-2 pi i f c) (numpy.fft reference), to the window's
    # ripple, over the seismic part of the band (below 0.7 Nyquist).
    c = np.array([12.3, 15.5, 17.81])
    spikes = fractional_delay_spike(64, delay_samples=c, half_width=8, kaiser_beta=8.0)
    f = np.fft.rfftfreq(64)
    response = np.fft.rfft(spikes, axis=1)
    ideal = np.exp(-2j * np.pi * f[None, :] * c[:, None])
    band = f <= 0.35
    assert np.abs(response[:, band] - ideal[:, band]).max() < 2e-3
    assert np.all(spikes[:, :4] == 0.0) and np.all(spikes[:, 27:] == 0.0)


def test_band_taper_corners():
    f = np.array([0.0, 3.0, 4.5, 6.0, 40.0, 80.0, 90.0, 100.0, 120.0])
    taper = band_taper(f, corners_hz=(3.0, 6.0, 80.0, 100.0))
    np.testing.assert_allclose(taper, [0, 0, 0.5, 1, 1, 1, 0.5, 0, 0], atol=1e-12)
    with pytest.raises(ValueError, match="must increase"):
        band_taper(f, corners_hz=(6.0, 3.0, 80.0, 100.0))
