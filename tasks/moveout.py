"""Moveout corrections and analysis-window tapers (pure numpy).

Traces are float32 ``[n, n_samples]``, time axis last. Input sample ``k``
of trace ``i`` sits at ``delay_s[i] + k * dt_s`` (the delay recording time
of the trace header). Every corrected trace is on the zero-offset time axis
``t0_k = k * dt_s``, ``k = 0, 1, ...``: corrected traces start at ``t0 = 0``
whatever their delay, so traces of one gather line up sample for sample.

Resampling: output sample ``t0`` takes the input at the moveout time
``t(t0)`` by linear interpolation of the input samples extended by zeros on
both sides (a time before the first sample or after the last reads a
linear ramp to zero within one sample and zero beyond). Linear interpolation
averages to the zero-phase response ``sinc^2(f dt)`` over fractional
positions (0.80 in amplitude at 65 Hz and 4 ms); it is the price of
resampling 10^8 traces at a few times the cost of an FFT. Positions are
float32 sample indices: within about 1e-4 of a sample for 2,000-sample
traces, 1e-3 for 16,000.

- NMO (the hyperbolic normal-moveout equation; Yilmaz 2001, *Seismic Data
  Analysis*, ch. 3): ``t(t0)^2 = t0^2 + x^2 / v(t0)^2`` with the RMS
  velocity ``v`` linear in ``t0`` between the given ``(t0, vrms)`` points and
  constant beyond them. NMO stretch ``(t - t0) / t0`` (Yilmaz's
  ``Delta t_NMO / t0``, the relative frequency distortion); samples stretched
  more than ``stretch_mute`` are set to 0 (at ``t0 = 0`` every sample of a
  non-zero offset counts as infinitely stretched).
- LMO: ``t(t0) = t0 + intercept_s + |x| / v``: an arrival along
  ``t = t_i + |x| / v`` lands at ``t0 = t_i - intercept_s``.
"""

from __future__ import annotations

import numpy as np

from .errors import ConfigError

# A time within this fraction of a sample of a window edge counts as on the edge.
_EDGE = 1e-9


def _velocity_function(velocity_t0_s, velocity_vrms_mps) -> tuple[np.ndarray, np.ndarray]:
    t = np.asarray(velocity_t0_s, dtype=np.float64).ravel()
    v = np.asarray(velocity_vrms_mps, dtype=np.float64).ravel()
    if t.size == 0 or t.shape != v.shape:
        raise ConfigError(
            f"velocity function: got {t.size} t0 values and {v.size} velocities; "
            "expected the same number, at least one"
        )
    if np.any(np.diff(t) <= 0) or not np.all(np.isfinite(t)):
        raise ConfigError(f"velocity t0 values must be finite and increase, got {t.tolist()}")
    if not np.all(v > 0) or not np.all(np.isfinite(v)):
        raise ConfigError(f"RMS velocities must be finite and positive, got {v.tolist()} m/s")
    return t, v


def _per_trace(name: str, value, n: int) -> np.ndarray:
    """A per-trace float64 [n] array (a scalar is broadcast)."""
    a = np.asarray(value, dtype=np.float64)
    if a.ndim == 0:
        return np.full(n, float(a))
    a = a.ravel()
    if a.size != n:
        raise ConfigError(f"{name}: got {a.size} values for {n} traces; expected one per trace or a scalar")
    return a


def _check_traces(traces) -> np.ndarray:
    t = np.asarray(traces)
    if t.ndim != 2:
        raise ConfigError(f"traces: got an array of shape {t.shape}; expected [n_traces, n_samples]")
    return np.asarray(t, dtype=np.float32)


def _check_dt(dt_s: float) -> float:
    if not (np.isfinite(dt_s) and dt_s > 0):
        raise ConfigError(f"dt_s = {dt_s}: the sample interval must be positive (seconds)")
    return float(dt_s)


def rms_velocity_at(t0_s, *, velocity_t0_s, velocity_vrms_mps) -> np.ndarray:
    """RMS velocity (m/s) at zero-offset times ``t0_s`` (s).

    ``velocity_t0_s`` float [m] increasing, ``velocity_vrms_mps`` float [m]
    positive; linear interpolation between the points, constant beyond the
    ends. Returns float64 with the shape of ``t0_s``.
    """
    t, v = _velocity_function(velocity_t0_s, velocity_vrms_mps)
    return np.interp(np.asarray(t0_s, dtype=np.float64), t, v)


def nmo_times(t0_s, offset_m, *, velocity_t0_s, velocity_vrms_mps) -> np.ndarray:
    """Hyperbolic moveout times ``t = sqrt(t0^2 + x^2 / v(t0)^2)`` (s).

    t0_s: float [ns]; offset_m: float [n] (the sign is ignored). Returns
    float64 [n, ns] (``t[i, k]`` for offset ``i`` and zero-offset time ``k``).
    """
    t0 = np.asarray(t0_s, dtype=np.float64).ravel()
    x = np.asarray(offset_m, dtype=np.float64).ravel()
    inv_v2 = rms_velocity_at(t0, velocity_t0_s=velocity_t0_s, velocity_vrms_mps=velocity_vrms_mps) ** -2
    t = np.multiply.outer(x * x, inv_v2)
    t += t0 * t0
    return np.sqrt(t, out=t)


# Output samples per block of the resampler: its float32 temporaries stay in
# cache, several times faster than whole 1,000-trace chunks on our machines.
_BLOCK_SAMPLES = 1 << 16


def _blocks(n: int, m: int, ns: int):
    """Row slices of at most about _BLOCK_SAMPLES outputs, and few enough rows
    that every flat index of the padded block is an exact float32 integer."""
    step = max(1, min(_BLOCK_SAMPLES // max(m, 1), (2**24 - 1) // (ns + 2)))
    for start in range(0, n, step):
        yield slice(start, min(start + step, n))


def _zero_padded(traces: np.ndarray, rows: int) -> np.ndarray:
    """A flat float32 buffer for blocks of ``rows`` traces, each stored as
    ``[0, samples..., 0]`` (stride ``ns + 2``), plus one trailing zero."""
    return np.zeros(rows * (traces.shape[1] + 2) + 1, dtype=np.float32)


def _resample_block(traces: np.ndarray, padded_index: np.ndarray, keep: np.ndarray | None,
                    buf: np.ndarray) -> np.ndarray:
    """Linear interpolation of the zero-extended traces at fractional positions.

    traces float32 [b, ns]; padded_index float32 [b, m] (overwritten): the
    sample index plus one (sample ``k`` of a trace at ``k + 1``, the zeros
    around it at 0 and ``ns + 1``); keep bool [b, m] or None (outputs not
    kept are 0); buf from :func:`_zero_padded` for at least ``b`` rows.
    Returns float32 [b, m].
    """
    b, ns = traces.shape
    stride = ns + 2
    buf[: b * stride].reshape(b, stride)[:, 1 : ns + 1] = traces  # the pads stay zero
    f = padded_index
    np.clip(f, np.float32(0.0), np.float32(ns + 1), out=f)  # a clipped position reads a zero with weight 1
    if keep is not None:
        np.multiply(f, keep, out=f)  # a muted sample reads the zero before its trace
    whole = np.floor(f)
    f -= whole
    # integers below 2**24 are exact in float32, so the flat index is exact
    whole += (np.arange(b, dtype=np.float32) * np.float32(stride))[:, None]
    i = whole.astype(np.intp)
    left = buf.take(i)
    out = buf[1:].take(i)
    out -= left
    out *= f
    out += left
    return out


def _nmo_segment(traces, *, offset_m, delay_s, dt_s, first, count, velocity_t0_s, velocity_vrms_mps,
                 stretch_mute) -> np.ndarray:
    """NMO-corrected output samples ``first .. first + count - 1`` (t0 = k dt): float32 [n, count]."""
    n = traces.shape[0]
    x = _per_trace("offset_m", offset_m, n)
    delay = _per_trace("delay_s", delay_s, n)
    if stretch_mute is not None and not stretch_mute >= 0:
        raise ConfigError(f"stretch_mute = {stretch_mute}: expected a relative stretch >= 0 (for example 0.5) or None")
    k0 = first + np.arange(count, dtype=np.float64)  # t0 / dt
    t0 = k0 * dt_s
    # in samples: (t / dt)^2 = k0^2 + x^2 / (v(t0) dt)^2
    slow2 = (rms_velocity_at(t0, velocity_t0_s=velocity_t0_s, velocity_vrms_mps=velocity_vrms_mps) * dt_s) ** -2
    slow2, k02 = slow2.astype(np.float32), (k0 * k0).astype(np.float32)
    limit = None if stretch_mute is None else (((1.0 + stretch_mute) * k0) ** 2).astype(np.float32)
    x2 = (x * x).astype(np.float32)
    lead = (1.0 - delay / dt_s).astype(np.float32)  # +1: the zero before each trace
    out = np.empty((n, count), dtype=np.float32)
    buf = None
    for rows in _blocks(n, count, traces.shape[1]):
        buf = _zero_padded(traces, rows.stop - rows.start) if buf is None else buf
        t = np.multiply.outer(x2[rows], slow2)
        t += k02
        keep = None if limit is None else t <= limit  # (t - t0) / t0 <= stretch_mute, on squares
        np.sqrt(t, out=t)
        t += lead[rows, None]
        out[rows] = _resample_block(traces[rows], t, keep, buf)
    return out


def nmo_correct(traces, *, offset_m, delay_s, dt_s, velocity_t0_s, velocity_vrms_mps, stretch_mute) -> np.ndarray:
    """Normal-moveout correction with a stretch mute.

    traces float32 [n, ns], input sample ``k`` at ``delay_s[i] + k dt_s``;
    offset_m float [n]; delay_s float [n] or scalar (s); velocity function
    as in :func:`rms_velocity_at`; stretch_mute: largest relative stretch
    ``(t - t0) / t0`` kept (for example 0.5), or None for no mute. Returns
    float32 [n, ns], output sample ``k`` at ``t0 = k dt_s``:
    ``out(t0) = in(sqrt(t0^2 + x^2 / v(t0)^2))`` (module notes), 0 where
    muted or outside the record.
    """
    data = _check_traces(traces)
    dt = _check_dt(dt_s)
    return _nmo_segment(data, offset_m=offset_m, delay_s=delay_s, dt_s=dt, first=0, count=data.shape[1],
                        velocity_t0_s=velocity_t0_s, velocity_vrms_mps=velocity_vrms_mps,
                        stretch_mute=stretch_mute)


def _lmo_segment(traces, *, offset_m, delay_s, dt_s, first, count, velocity_mps, intercept_s) -> np.ndarray:
    n = traces.shape[0]
    if not (np.isfinite(velocity_mps) and velocity_mps > 0):
        raise ConfigError(f"LMO velocity = {velocity_mps} m/s: expected a positive velocity")
    x = _per_trace("offset_m", offset_m, n)
    delay = _per_trace("delay_s", delay_s, n)
    shift = 1.0 + (intercept_s + np.abs(x) / velocity_mps - delay) / dt_s  # +1: the zero before each trace
    k0 = first + np.arange(count, dtype=np.float64)
    out = np.empty((n, count), dtype=np.float32)
    buf = None
    for rows in _blocks(n, count, traces.shape[1]):
        buf = _zero_padded(traces, rows.stop - rows.start) if buf is None else buf
        # float64 sum before rounding, so a large shift keeps its fraction
        index = np.add.outer(shift[rows], k0).astype(np.float32)
        out[rows] = _resample_block(traces[rows], index, None, buf)
    return out


def lmo_correct(traces, *, offset_m, delay_s, dt_s, velocity_mps, intercept_s: float = 0.0) -> np.ndarray:
    """Linear-moveout correction ``out(t0) = in(t0 + intercept_s + |x| / velocity_mps)``.

    traces float32 [n, ns], input sample ``k`` at ``delay_s[i] + k dt_s``;
    offset_m float [n]; delay_s float [n] or scalar. Returns float32 [n, ns],
    output sample ``k`` at ``t0 = k dt_s``; an arrival along
    ``t = t_i + |x| / v`` lands at ``t0 = t_i - intercept_s``.
    """
    data = _check_traces(traces)
    dt = _check_dt(dt_s)
    return _lmo_segment(data, offset_m=offset_m, delay_s=delay_s, dt_s=dt, first=0, count=data.shape[1],
                        velocity_mps=velocity_mps, intercept_s=intercept_s)


def _check_window(start_s: float, end_s: float, taper_s: float) -> None:
    if not (np.isfinite(start_s) and np.isfinite(end_s) and 0 <= start_s < end_s):
        raise ConfigError(f"analysis window ({start_s}, {end_s}) s: expected 0 <= start < end")
    if not (np.isfinite(taper_s) and 0 <= 2 * taper_s <= end_s - start_s):
        raise ConfigError(
            f"taper_s = {taper_s}: expected 0 <= taper and two tapers within the "
            f"{end_s - start_s:g} s window; shorten the taper or widen the window"
        )


def taper_at(t_s, *, start_s: float, end_s: float, taper_s: float) -> np.ndarray:
    """Window weight at times ``t_s`` (any shape, s), float64 in [0, 1].

    0 outside ``[start_s, end_s]``; inside, raised-cosine flanks of length
    ``taper_s`` at both edges: ``sin^2(pi/2 (t - start) / taper)`` rising,
    ``sin^2(pi/2 (end - t) / taper)`` falling, 1 between. With
    ``taper_s = 0`` a boxcar that includes both edges.
    """
    _check_window(start_s, end_s, taper_s)
    t = np.asarray(t_s, dtype=np.float64)
    span = end_s - start_s
    inside = (t >= start_s - _EDGE * span) & (t <= end_s + _EDGE * span)
    if taper_s == 0:
        return inside.astype(np.float64)
    rise = np.sin(0.5 * np.pi * np.clip((t - start_s) / taper_s, 0.0, 1.0)) ** 2
    fall = np.sin(0.5 * np.pi * np.clip((end_s - t) / taper_s, 0.0, 1.0)) ** 2
    return np.where(inside, rise * fall, 0.0)


def window_taper(n_samples: int, *, dt_s: float, start_s: float, end_s: float, taper_s: float) -> np.ndarray:
    """Analysis-window weights on the corrected time axis ``t0_k = k dt_s``.

    Returns float64 [n_samples], :func:`taper_at` at ``k dt_s``: 0 outside
    the window, cosine tapers of ``taper_s`` inside both edges.
    """
    dt = _check_dt(dt_s)
    return taper_at(np.arange(int(n_samples)) * dt, start_s=start_s, end_s=end_s, taper_s=taper_s)


def window_samples(*, dt_s: float, start_s: float, end_s: float) -> tuple[int, int]:
    """``(first, count)``: the samples ``k`` of the t0 axis with ``start_s <= k dt_s <= end_s``."""
    dt = _check_dt(dt_s)
    _check_window(start_s, end_s, 0.0)
    first = int(np.ceil(start_s / dt - _EDGE))
    last = int(np.floor(end_s / dt + _EDGE))
    return first, max(last - first + 1, 0)
