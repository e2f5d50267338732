"""Windowed spectra of moveout-corrected traces (pure numpy / scipy.fft).

One spectrum per trace, of one wave mode: the trace is moveout corrected
(NMO, or LMO for early arrivals; :mod:`descatter.tasks.moveout`), muted,
tapered to the analysis window and Fourier transformed; only the bins of
the analysis band are kept.

Time origin: the spectra are of the corrected trace on its zero-offset time
axis ``t0_k = k dt`` starting at ``t0 = 0`` (not at the record's delay), so
``D(f) = sum_k w(t0_k) y(t0_k) exp(-2 pi i f t0_k)`` with ``y`` the corrected
trace and ``w`` the window taper. A pure delay ``tau`` of an event therefore
shows as the phase ``-2 pi f tau``, and ``D_j conj(D_k)`` of two traces has
phase ``-2 pi f (tau_j - tau_k)`` (positive static = late arrival).

Frequencies are the bins ``f_m = m / (n_fft dt)`` of a length-``n_fft``
real FFT. Only the window's samples are transformed (``n_fft`` must hold the
window, not the whole trace); the phase ramp ``exp(-2 pi i f_m k0 dt)``
puts the window's first sample ``k0`` back at its time.
"""

from __future__ import annotations

import numpy as np
import scipy.fft as sfft

from .errors import ConfigError
from .moveout import _check_dt, _check_traces, _lmo_segment, _nmo_segment, taper_at, window_samples

MOVEOUTS = ("nmo", "lmo")


def band_frequencies(*, n_fft: int, dt_s: float, band_hz: tuple[float, float]) -> tuple[np.ndarray, np.ndarray]:
    """The real-FFT bins inside the analysis band.

    Returns ``(freqs_hz, index)``: float64 [n_freq] frequencies
    ``m / (n_fft dt_s)`` with ``band_hz[0] <= f <= band_hz[1]`` (edges
    included to rounding), and int64 [n_freq] their bins ``m`` in
    ``scipy.fft.rfft(x, n_fft)``. Raises ConfigError when the band holds no
    bin or lies beyond Nyquist.
    """
    dt = _check_dt(dt_s)
    n_fft = int(n_fft)
    if n_fft < 2:
        raise ConfigError(f"n_fft = {n_fft}: expected at least 2 samples")
    lo, hi = (float(b) for b in band_hz)
    nyquist = 0.5 / dt
    if not 0 <= lo <= hi <= nyquist:
        raise ConfigError(f"band_hz = ({lo}, {hi}): expected 0 <= low <= high <= Nyquist = {nyquist:g} Hz")
    df = 1.0 / (n_fft * dt)
    bins = np.arange(n_fft // 2 + 1, dtype=np.int64)
    freqs = bins * df
    tol = 1e-9 * df
    index = bins[(freqs >= lo - tol) & (freqs <= hi + tol)]
    if index.size == 0:
        raise ConfigError(
            f"band_hz = ({lo}, {hi}) holds no bin of an n_fft = {n_fft} FFT (bin spacing {df:g} Hz); "
            "widen the band or raise n_fft"
        )
    return freqs[index], index


def windowed_spectra(
    traces,
    *,
    offset_m,
    delay_s,
    dt_s: float,
    velocity_t0_s=None,
    velocity_vrms_mps=None,
    window_s: tuple[float, float],
    taper_s: float,
    stretch_mute: float | None,
    n_fft: int,
    band_hz: tuple[float, float],
    moveout: str = "nmo",
    lmo_velocity_mps: float | None = None,
    lmo_intercept_s: float = 0.0,
    workers: int | None = None,
) -> np.ndarray:
    """Band spectra of moveout-corrected, muted, tapered analysis windows.

    traces float32 [n, ns], input sample ``k`` at ``delay_s[i] + k dt_s``;
    offset_m float [n]; delay_s float [n] or scalar (s).
    ``moveout="nmo"``: :func:`~descatter.tasks.moveout.nmo_correct` with the
    velocity function (``velocity_t0_s``, ``velocity_vrms_mps``) and
    ``stretch_mute``; ``"lmo"``: :func:`~descatter.tasks.moveout.lmo_correct`
    with ``lmo_velocity_mps`` and ``lmo_intercept_s`` (``stretch_mute``
    unused). ``window_s = (start, end)`` on the corrected t0 axis, with
    cosine tapers of ``taper_s`` inside its edges
    (:func:`~descatter.tasks.moveout.taper_at`). ``n_fft`` at least the
    window's sample count. ``workers``: threads of ``scipy.fft`` (None: its
    default of one, right for a Dask worker; -1 all cores).

    Returns complex64 [n, n_freq] on the bins of :func:`band_frequencies`:
    ``D(f) = sum_k w(k dt) y(k dt) exp(-2 pi i f k dt)`` (module notes).
    Dead (all-zero) traces give zeros; non-finite samples give non-finite
    spectra, so such traces must be marked not live downstream.
    """
    data = _check_traces(traces)
    dt = _check_dt(dt_s)
    if moveout not in MOVEOUTS:
        raise ConfigError(f"moveout = {moveout!r}: expected one of {', '.join(MOVEOUTS)}")
    start, end = (float(w) for w in window_s)
    first, count = window_samples(dt_s=dt, start_s=start, end_s=end)
    weight = taper_at((first + np.arange(count)) * dt, start_s=start, end_s=end, taper_s=taper_s)
    freqs, index = band_frequencies(n_fft=n_fft, dt_s=dt, band_hz=band_hz)
    if count > n_fft:
        raise ConfigError(
            f"n_fft = {n_fft} is shorter than the {count}-sample analysis window {window_s} s at "
            f"dt = {dt} s; use n_fft >= {count} (scipy.fft.next_fast_len({count}, real=True) = "
            f"{sfft.next_fast_len(count, real=True)})"
        )
    n = data.shape[0]
    if n == 0 or count == 0:
        return np.zeros((n, index.size), dtype=np.complex64)
    if moveout == "nmo":
        if velocity_t0_s is None or velocity_vrms_mps is None:
            raise ConfigError("moveout = 'nmo' needs velocity_t0_s and velocity_vrms_mps")
        segment = _nmo_segment(data, offset_m=offset_m, delay_s=delay_s, dt_s=dt, first=first, count=count,
                               velocity_t0_s=velocity_t0_s, velocity_vrms_mps=velocity_vrms_mps,
                               stretch_mute=stretch_mute)
    else:
        if lmo_velocity_mps is None:
            raise ConfigError("moveout = 'lmo' needs lmo_velocity_mps")
        segment = _lmo_segment(data, offset_m=offset_m, delay_s=delay_s, dt_s=dt, first=first, count=count,
                               velocity_mps=lmo_velocity_mps, intercept_s=lmo_intercept_s)
    segment *= weight.astype(np.float32)
    # the band is a run of bins: slice it (fancy indexing returns a column-major array)
    spectrum = sfft.rfft(segment, n=int(n_fft), axis=-1, workers=workers)[:, index[0] : index[-1] + 1]
    # exp(-2 pi i m k0 / n_fft), the exact bin phase of a shift by k0 samples
    ramp = np.exp(-2j * np.pi * ((index * first) % n_fft) / n_fft).astype(np.complex64)
    return np.multiply(spectrum, ramp, dtype=np.complex64)  # a new row-major array
