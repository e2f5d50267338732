"""Wavelets and small band-limited building blocks (pure numpy).

Everything here is evaluated from a closed formula, so a trace built from it
does not depend on how a caller slices its time axis.
"""

from __future__ import annotations

import numpy as np


def ricker(t: np.ndarray, *, peak_hz: float) -> np.ndarray:
    """Zero-phase Ricker wavelet with unit peak at ``t = 0``.

    ``w(t) = (1 - 2 pi^2 fp^2 t^2) exp(-pi^2 fp^2 t^2)``, ``fp = peak_hz``
    the peak frequency of its amplitude spectrum (Ricker 1953; Ryan 1994,
    "Ricker, Ormsby, Klauder, Butterworth - a choice of wavelets", CSEG
    Recorder). Side-lobe minima ``-2 exp(-3/2)`` sit at
    ``t = +-sqrt(3/2) / (pi fp)``.

    t: float array of any shape, seconds. Returns float64, same shape.
    """
    a = (np.pi * peak_hz * np.asarray(t, dtype=np.float64)) ** 2
    return (1.0 - 2.0 * a) * np.exp(-a)


def ricker_spectrum(f: np.ndarray, *, peak_hz: float) -> np.ndarray:
    """Fourier transform of :func:`ricker` (real: the wavelet is zero phase).

    ``W(f) = (2 / sqrt(pi)) f^2 / fp^3 exp(-f^2 / fp^2)`` with the transform
    ``W(f) = integral w(t) exp(-2 pi i f t) dt`` (units: seconds). Its
    maximum over ``f >= 0`` is at ``f = fp``. A trace sampled at ``dt`` holds
    ``W(f) / dt`` in the bins of an unnormalised ``rfft``.

    f: float array of any shape, Hz (the sign does not matter). Returns
    float64, same shape.
    """
    f = np.asarray(f, dtype=np.float64)
    return (2.0 / np.sqrt(np.pi)) * f**2 / peak_hz**3 * np.exp(-((f / peak_hz) ** 2))


def fractional_delay_spike(
    n_samples: int, *, delay_samples: np.ndarray, half_width: int, kaiser_beta: float
) -> np.ndarray:
    """Band-limited unit spike at a fractional sample position.

    ``s[..., n] = sinc(n - c) w(n - c)`` for ``|n - c| <= half_width``, else 0,
    with ``c = delay_samples`` and the continuous Kaiser window
    ``w(u) = I0(beta sqrt(1 - (u / half_width)^2)) / I0(beta)``. Its spectrum
    is ``exp(-2 pi i f c dt)`` to within the window's ripple over most of the
    band below Nyquist.

    delay_samples: float array of shape ``S`` (any). Returns float64
    ``S + (n_samples,)``.
    """
    c = np.asarray(delay_samples, dtype=np.float64)[..., None]
    u = np.arange(n_samples, dtype=np.float64) - c
    inside = np.abs(u) <= half_width
    ratio = np.where(inside, u / half_width, 0.0)
    window = np.i0(kaiser_beta * np.sqrt(1.0 - ratio**2)) / np.i0(kaiser_beta)
    return np.where(inside, np.sinc(u) * window, 0.0)


def band_taper(f: np.ndarray, *, corners_hz: tuple[float, float, float, float]) -> np.ndarray:
    """Trapezoid band-pass amplitude with raised-cosine flanks.

    0 below ``f1``, rising as ``sin^2`` to 1 at ``f2``, 1 up to ``f3``, falling
    to 0 at ``f4`` (``corners_hz = (f1, f2, f3, f4)``, increasing).

    f: float array of any shape, Hz. Returns float64 in [0, 1], same shape.
    """
    f1, f2, f3, f4 = corners_hz
    if not f1 < f2 <= f3 < f4:
        raise ValueError(f"band corners must increase (f1 < f2 <= f3 < f4), got {corners_hz}")
    f = np.abs(np.asarray(f, dtype=np.float64))
    rise = np.sin(0.5 * np.pi * np.clip((f - f1) / (f2 - f1), 0.0, 1.0)) ** 2
    fall = np.cos(0.5 * np.pi * np.clip((f - f3) / (f4 - f3), 0.0, 1.0)) ** 2
    return rise * fall
