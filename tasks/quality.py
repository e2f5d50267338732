"""Quality measures a person can judge at a glance (pure numpy / scipy).

- Semblance (Neidell & Taner 1971, "Semblance and other coherency measures
  for multichannel data", Geophysics 36) of a gather whose events are flat
  (after moveout correction, or flat by construction), and the
  signal-to-noise ratio it implies.
- Zero-lag normalised correlation of traces with a reference (the truth, in
  tests; the input, in QC).
- A zero-phase band limit, so corrected traces and truth are compared in the
  same band.
- Station spacing against the near-surface wavelength.
- Mean amplitude spectra and CMP bin numbers, for QC per bin.

Semblance and signal-to-noise. For a gather of N traces
``a_i(t) = s(t) + n_i(t)`` with a common signal of power ``P_s`` and
independent zero-mean noises of power ``P_n`` each, ``r = P_n / P_s``:
``E (sum_i a_i)^2 = N^2 P_s + N P_n`` and ``E N sum_i a_i^2 = N^2 (P_s + P_n)``,
so semblance ``S = (N + r) / (N (1 + r))``. Solved for the power
signal-to-noise ratio ``1 / r``::

    snr = (N S - 1) / (N (1 - S))    ->    S / (1 - S)   as N -> infinity

Independent noise alone (``r -> infinity``) gives ``S = 1/N``: the cross
terms of the stacked power average to zero, so stacking adds the noise
powers (``N P_n``) while the denominator is ``N^2 P_n``.
"""

from __future__ import annotations

import numpy as np
import scipy.fft as sfft

from .errors import ConfigError

# common practice (DESIGN section 5): above this station spacing the scattered
# wavefield of the top metres (100-300 m/s, wavelengths of about 1-5 m) is not resolved
COMMON_PRACTICE_MAX_SPACING_M = (3.0, 5.0)


# --------------------------------------------------------------------------- semblance


def _window_sums(x: np.ndarray, window_samples: int) -> np.ndarray:
    """Sum of x[t - h : t - h + w] (truncated at the ends), h = w // 2, for every t of a 1-D x.

    Summed window by window (not as a difference of cumulative sums, which
    loses the small windows of a trace with large events elsewhere)."""
    h = window_samples // 2
    padded = np.concatenate([np.zeros(h), x, np.zeros(window_samples - h - 1)])
    return np.lib.stride_tricks.sliding_window_view(padded, window_samples).sum(axis=-1)


def _ratio(numerator: np.ndarray, denominator: np.ndarray) -> np.ndarray:
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(denominator > 0, numerator / np.where(denominator > 0, denominator, 1.0), 0.0)


def semblance(gather: np.ndarray, *, window_samples: int) -> np.ndarray:
    """Semblance of a gather in a sliding window (Neidell & Taner 1971).

    gather: float [n_traces, ns] with flat events. Returns float64 [ns] in [0, 1]::

        S(t) = sum_{tau in W(t)} (sum_i a_i(tau))^2 / (N sum_{tau in W(t)} sum_i a_i(tau)^2)

    ``W(t)`` = samples ``t - w//2 .. t - w//2 + w - 1`` (``w = window_samples``,
    truncated at the trace ends), ``N = n_traces`` (dead traces count: drop
    them first if they should not). 0 where the window holds no energy.
    """
    a = np.asarray(gather, dtype=np.float64)
    if a.ndim != 2 or a.shape[0] == 0:
        raise ConfigError(f"gather has shape {a.shape}: expected [n_traces >= 1, n_samples]")
    if window_samples < 1:
        raise ConfigError(f"window_samples = {window_samples}: expected at least 1")
    stacked = _window_sums(a.sum(axis=0) ** 2, window_samples)
    energy = _window_sums((a**2).sum(axis=0), window_samples)
    return np.minimum(_ratio(stacked, a.shape[0] * energy), 1.0)  # <= 1 by Cauchy-Schwarz, up to rounding


def gather_semblance(gather: np.ndarray, *, start: int, stop: int) -> float:
    """Semblance of the analysis window ``start:stop`` (samples) as one number::

        S = sum_{t=start}^{stop-1} (sum_i a_i(t))^2 / (N sum_t sum_i a_i(t)^2)

    gather: float [n_traces, ns]. Returns a float in [0, 1] (0 without energy).
    """
    a = np.asarray(gather, dtype=np.float64)
    if a.ndim != 2 or a.shape[0] == 0:
        raise ConfigError(f"gather has shape {a.shape}: expected [n_traces >= 1, n_samples]")
    _check_window(start, stop, a.shape[1])
    w = a[:, start:stop]
    return float(min(_ratio(np.sum(w.sum(axis=0) ** 2), a.shape[0] * np.sum(w**2)), 1.0))


def grouped_semblance(
    traces: np.ndarray, groups: np.ndarray, *, start: int, stop: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """:func:`gather_semblance` of every group of traces at once (shots, CMP bins...).

    traces: float [n, ns]; groups: int [n], a group label per trace.
    Returns (labels int64 [n_groups] sorted, semblance float64 [n_groups],
    trace count int64 [n_groups]).
    """
    a = np.asarray(traces, dtype=np.float64)
    g = np.asarray(groups).reshape(-1)
    if a.ndim != 2 or g.shape != (a.shape[0],):
        raise ConfigError(f"traces {a.shape} and groups {g.shape}: expected [n, n_samples] and one label per trace")
    _check_window(start, stop, a.shape[1])
    labels, where, count = np.unique(g, return_inverse=True, return_counts=True)
    w = a[:, start:stop]
    order = np.argsort(where.reshape(-1), kind="stable")
    stacks = np.add.reduceat(w[order], np.concatenate([[0], np.cumsum(count)[:-1]]), axis=0)
    energy = np.bincount(where.reshape(-1), weights=np.sum(w**2, axis=1), minlength=len(labels))
    s = np.minimum(_ratio(np.sum(stacks**2, axis=1), count * energy), 1.0)
    return labels.astype(np.int64), s, count.astype(np.int64)


def signal_to_noise(s: np.ndarray | float, *, n_traces: int | None = None) -> np.ndarray:
    """Power signal-to-noise ratio implied by semblance ``s`` (see the module notes).

    ``n_traces=None``: ``s / (1 - s)``, the limit for many traces.
    ``n_traces=N``: ``(N s - 1) / (N (1 - s))``, exact in expectation for N
    traces of one signal plus independent noise of equal power; 0 for
    ``s <= 1/N`` (nothing above the noise). ``inf`` at ``s = 1``.
    Returns float64, the shape of ``s``.
    """
    s = np.asarray(s, dtype=np.float64)
    with np.errstate(divide="ignore"):
        if n_traces is None:
            return np.where(s < 1, s / np.where(s < 1, 1 - s, 1.0), np.inf)
        if n_traces < 1:
            raise ConfigError(f"n_traces = {n_traces}: expected at least 1")
        n = float(n_traces)
        snr = np.where(s < 1, (n * s - 1) / (n * np.where(s < 1, 1 - s, 1.0)), np.inf)
    return np.maximum(snr, 0.0)


def _check_window(start: int, stop: int, ns: int) -> None:
    if not 0 <= start < stop <= ns:
        raise ConfigError(f"window start = {start}, stop = {stop}: expected 0 <= start < stop <= {ns} samples")


# --------------------------------------------------------------------------- comparisons


def zero_lag_correlation(a: np.ndarray, b: np.ndarray, *, start: int = 0, stop: int | None = None) -> np.ndarray:
    """Normalised zero-lag correlation of each row pair over samples ``start:stop``::

        c = sum_t a b / sqrt(sum_t a^2 sum_t b^2)

    (no mean removed: traces are zero-mean band-limited signals). a, b:
    float [n, ns]. Returns float64 [n] in [-1, 1]; 0 where either row has no
    energy in the window.
    """
    x = np.asarray(a, dtype=np.float64)
    y = np.asarray(b, dtype=np.float64)
    if x.shape != y.shape or x.ndim != 2:
        raise ConfigError(f"a {x.shape} and b {y.shape}: expected two arrays of one shape [n, n_samples]")
    stop = x.shape[1] if stop is None else stop
    _check_window(start, stop, x.shape[1])
    x, y = x[:, start:stop], y[:, start:stop]
    return _ratio(np.sum(x * y, axis=1), np.sqrt(np.sum(x**2, axis=1) * np.sum(y**2, axis=1)))


def band_weights(freqs_hz: np.ndarray, *, band_hz: tuple[float, float], taper_hz: float) -> np.ndarray:
    """Zero-phase band amplitude: 1 on ``[lo, hi]``, raised-cosine flanks of
    width ``taper_hz`` outside it (``sin^2`` from ``lo - taper`` to ``lo``,
    ``cos^2`` from ``hi`` to ``hi + taper``), 0 beyond. ``lo <= 0`` keeps
    DC. freqs_hz: float, any shape. Returns float64, same shape."""
    lo, hi = band_hz
    if not 0 <= lo < hi or taper_hz <= 0:
        raise ConfigError(f"band_hz = {band_hz}, taper_hz = {taper_hz}: expected 0 <= low < high and taper > 0")
    f = np.abs(np.asarray(freqs_hz, dtype=np.float64))
    rise = np.sin(0.5 * np.pi * np.clip((f - lo + taper_hz) / taper_hz, 0, 1)) ** 2 if lo > 0 else 1.0
    fall = np.cos(0.5 * np.pi * np.clip((f - hi) / taper_hz, 0, 1)) ** 2
    return rise * fall


def bandpass(traces: np.ndarray, *, dt_s: float, band_hz: tuple[float, float], taper_hz: float) -> np.ndarray:
    """Zero-phase band limit of each trace in the frequency domain.

    traces: float [n, ns]. Returns float64 [n, ns]: ``irfft(rfft(x, L) W)``
    with ``W`` :func:`band_weights` and ``L = next_fast_len(2 ns)``, so the
    filter's tails (it is real and even in time) do not wrap the end of a
    trace onto its start.
    """
    x = np.asarray(traces, dtype=np.float64)
    ns = x.shape[-1]
    n_fft = sfft.next_fast_len(2 * ns, real=True)
    w = band_weights(sfft.rfftfreq(n_fft, dt_s), band_hz=band_hz, taper_hz=taper_hz)
    return sfft.irfft(sfft.rfft(x, n_fft, axis=-1) * w, n_fft, axis=-1)[..., :ns]


def amplitude_spectrum(traces: np.ndarray, *, dt_s: float, n_fft: int | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Mean amplitude spectrum of a set of traces.

    traces: float [n, ns]. Returns (freqs float64 [n_fft // 2 + 1] in Hz,
    ``mean_i |rfft(x_i, n_fft)|`` float64 [n_fft // 2 + 1]), unnormalised
    numpy.fft convention (a sinusoid of amplitude A on a bin gives
    ``A n_fft / 2``). ``n_fft`` defaults to ``next_fast_len(ns)``.
    """
    x = np.asarray(traces, dtype=np.float64)
    if x.ndim != 2 or x.shape[0] == 0:
        raise ConfigError(f"traces has shape {x.shape}: expected [n_traces >= 1, n_samples]")
    n_fft = sfft.next_fast_len(x.shape[1], real=True) if n_fft is None else int(n_fft)
    return sfft.rfftfreq(n_fft, dt_s), np.abs(sfft.rfft(x, n_fft, axis=-1)).mean(axis=0)


def cmp_bin_indices(
    cmp_x: np.ndarray, cmp_y: np.ndarray, *, bin_m: float | tuple[float, float], origin: tuple[float, float]
) -> np.ndarray:
    """CMP bin of each trace: int64 [n, 2], columns ``floor((x - x0) / bx)``
    and ``floor((y - y0) / by)``; ``bin_m`` one size or (bx, by) in metres,
    ``origin`` (x0, y0) the corner of bin (0, 0). Use
    ``numpy.unique(..., axis=0, return_inverse=True)`` for group labels."""
    bx, by = (bin_m, bin_m) if np.ndim(bin_m) == 0 else bin_m
    if bx <= 0 or by <= 0:
        raise ConfigError(f"bin_m = {bin_m}: expected positive bin sizes in metres")
    ix = np.floor((np.asarray(cmp_x, dtype=np.float64) - origin[0]) / bx)
    iy = np.floor((np.asarray(cmp_y, dtype=np.float64) - origin[1]) / by)
    return np.stack([ix, iy], axis=-1).astype(np.int64)


# --------------------------------------------------------------------------- station spacing


def spacing_adequacy(station_spacing_m: float, *, velocity_mps: float, band_hz: tuple[float, float]) -> dict:
    """Station spacing against the near-surface wavelength ``v / f`` over the band.

    Returns a dict of plain values:

    - ``wavelength_min_m = v / f_high`` and ``wavelength_max_m = v / f_low``
      (``inf`` for ``f_low = 0``);
    - ``nyquist_spacing_m = wavelength_min_m / 2``: the spatial Nyquist
      condition for the whole band is ``spacing <= wavelength / 2``;
    - ``highest_unaliased_hz = v / (2 spacing)``;
    - ``aliased`` (bool): the spacing fails the Nyquist condition at the top
      of the band;
    - ``warning``: a sentence for the user, or ``None``.

    Common practice (no published source): near-surface velocities of about
    100-300 m/s in the top metres give seismic wavelengths of about 1-5 m
    there, and a station spacing above about 3-5 m does not resolve the
    scattered wavefield. Each station's filter is then its own, and cannot
    be interpolated from its neighbours.
    """
    lo, hi = band_hz
    if not (station_spacing_m > 0 and velocity_mps > 0 and 0 <= lo < hi):
        raise ConfigError(
            f"station_spacing_m = {station_spacing_m}, velocity_mps = {velocity_mps}, band_hz = {band_hz}: "
            f"expected a positive spacing and velocity and 0 <= low < high"
        )
    spacing, v = float(station_spacing_m), float(velocity_mps)
    shortest, longest = v / hi, (v / lo if lo > 0 else float("inf"))
    nyquist_spacing = shortest / 2
    highest = v / (2 * spacing)
    aliased = spacing > nyquist_spacing
    warning = None
    if aliased:
        warning = (
            f"station spacing {spacing:g} m aliases the scattered wavefield: at {v:g} m/s the near-surface "
            f"wavelength is {shortest:.2g} m at {hi:g} Hz, so the spatial Nyquist condition needs a spacing "
            f"of at most {nyquist_spacing:.2g} m; waves in the scattering layer are sampled without aliasing "
            f"only up to {highest:.2g} Hz. Each station's scattering is measured on its own and cannot be "
            f"interpolated between stations."
        )
    return {
        "station_spacing_m": spacing,
        "velocity_mps": v,
        "band_hz": (float(lo), float(hi)),
        "wavelength_min_m": shortest,
        "wavelength_max_m": longest,
        "nyquist_spacing_m": nyquist_spacing,
        "highest_unaliased_hz": highest,
        "aliased": bool(aliased),
        "warning": warning,
    }
