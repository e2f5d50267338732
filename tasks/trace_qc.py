"""Per-trace QC flags: one bit per cause, one uint16 mask per trace.

Pure numpy kernels on one chunk: samples float32 [n, n_samples] (time axis
last) and per-trace header arrays [n]. Each flag names one cause, so a
planted fault sets exactly one bit:

- ``dead``: every sample is exactly zero.
- ``nan``: some sample is NaN or infinite.
- ``duplicate``: the same (source station, receiver station) pair occurs
  earlier in the arrays given (the first occurrence stays unflagged).
- ``zero_xy``: the source or the receiver position is missing: (0, 0) or
  not finite.
- ``offset_mismatch``: ``| |header offset| - hypot(rx - sx, ry - sy) | >
  tolerance`` (the sign of a header offset is a convention, so ignored).
  Not set on ``zero_xy`` traces: without coordinates there is nothing to
  compare the offset with.
- ``clipped``: a run of at least ``clip_run`` consecutive samples whose
  absolute value equals the trace's largest absolute value. Not set on
  ``dead`` or ``nan`` traces.
- ``excluded``: the user excluded the trace (a station, field record or
  trace range in the exclusion lists), see :func:`apply_exclusions`.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence

import numpy as np

from .errors import TraceQcError

#: bit of each flag in a trace's uint16 mask, in report order
FLAG_BITS: dict[str, int] = {
    "dead": 1 << 0,
    "nan": 1 << 1,
    "duplicate": 1 << 2,
    "zero_xy": 1 << 3,
    "offset_mismatch": 1 << 4,
    "clipped": 1 << 5,
    "excluded": 1 << 6,
}


def dead_traces(samples: np.ndarray) -> np.ndarray:
    """bool [n]: every sample of the trace is exactly zero. samples: float [n, n_samples]."""
    s = np.asarray(samples)
    # max |s| == 0 without a boolean temporary; a NaN trace is not dead
    return np.abs(s).max(axis=-1, initial=0) == 0 if s.size else np.ones(s.shape[0], bool)


def nan_traces(samples: np.ndarray) -> np.ndarray:
    """bool [n]: some sample is NaN or +-Inf (the ``nan`` flag)."""
    return ~np.all(np.isfinite(samples), axis=-1)


def clipped_traces(samples: np.ndarray, *, clip_run: int) -> np.ndarray:
    """bool [n]: a run of >= ``clip_run`` samples sits at the trace's peak.

    samples: float [n, n_samples]. With ``p = max_t |s[t]|`` and
    ``a[t] = (|s[t]| == p)``, flagged when some window of ``clip_run``
    consecutive samples is all ``a``: ``max_t (c[t + clip_run] - c[t]) ==
    clip_run`` with ``c`` the cumulative sum of ``a`` (leading zero). Dead
    (p == 0) and non-finite traces are never clipped.
    """
    if clip_run < 2:
        raise ValueError(f"clip_run = {clip_run}: a clipped run needs at least 2 samples")
    s = np.abs(np.asarray(samples))
    n, ns = s.shape
    if ns < clip_run or n == 0:
        return np.zeros(n, dtype=bool)
    with np.errstate(invalid="ignore"):
        peak = s.max(axis=-1)
    at_peak = s == peak[:, None]
    # Only traces with clip_run peak samples in all can hold such a run:
    # count runs on those few alone (a whole-chunk cumsum cost 10x more).
    out = np.zeros(n, dtype=bool)
    cand = np.flatnonzero((at_peak.sum(axis=-1) >= clip_run) & (peak > 0) & np.isfinite(peak))
    if cand.size:
        c = np.zeros((cand.size, ns + 1), dtype=np.int32)
        np.cumsum(at_peak[cand], axis=-1, out=c[:, 1:])
        out[cand] = (c[:, clip_run:] - c[:, :-clip_run]).max(axis=-1) >= clip_run
    return out


def zero_xy_traces(
    source_x: np.ndarray, source_y: np.ndarray, receiver_x: np.ndarray, receiver_y: np.ndarray
) -> np.ndarray:
    """bool [n]: source or receiver at exactly (0, 0) or not finite (``zero_xy``)."""
    sx, sy, rx, ry = (np.asarray(a, np.float64) for a in (source_x, source_y, receiver_x, receiver_y))
    src = ((sx == 0) & (sy == 0)) | ~np.isfinite(sx) | ~np.isfinite(sy)
    rec = ((rx == 0) & (ry == 0)) | ~np.isfinite(rx) | ~np.isfinite(ry)
    return src | rec


def offset_mismatch_traces(
    offset: np.ndarray, source_x: np.ndarray, source_y: np.ndarray, receiver_x: np.ndarray,
    receiver_y: np.ndarray, *, tolerance_m: float,
) -> np.ndarray:
    """bool [n]: ``not (| |offset| - hypot(rx - sx, ry - sy) | <= tolerance_m)``.

    offset: header offset [n] in metres (either sign); coordinates float [n].
    A non-finite header offset counts as a mismatch.
    """
    dist = np.hypot(np.asarray(receiver_x, np.float64) - source_x, np.asarray(receiver_y, np.float64) - source_y)
    with np.errstate(invalid="ignore"):
        return ~(np.abs(np.abs(np.asarray(offset, np.float64)) - dist) <= tolerance_m)


def duplicate_traces(source_key: np.ndarray, receiver_key: np.ndarray) -> np.ndarray:
    """bool [n]: the (source, receiver) station pair occurred earlier in these arrays.

    source_key, receiver_key: int64 [n] station keys or indices. The first
    occurrence (in array order) stays unflagged, later ones are flagged.
    Duplicates are found only within the arrays given: a chunk cannot see a
    repeat in another chunk. To flag across a whole swath, call this on the
    swath's whole key arrays (16 bytes a trace; sorting is O(n log n)) and
    pass each chunk its slice as ``duplicate=`` to :func:`trace_flags`.
    """
    s = np.asarray(source_key, np.int64).ravel()
    r = np.asarray(receiver_key, np.int64).ravel()
    out = np.zeros(s.size, dtype=bool)
    if s.size < 2:
        return out
    order = np.lexsort((np.arange(s.size), r, s))  # stable: earlier traces first within a pair
    same = (s[order][1:] == s[order][:-1]) & (r[order][1:] == r[order][:-1])
    out[order[1:][same]] = True
    return out


def trace_flags(
    samples: np.ndarray, *, source_x: np.ndarray, source_y: np.ndarray, receiver_x: np.ndarray,
    receiver_y: np.ndarray, offset: np.ndarray, offset_tolerance_m: float, clip_run: int,
    source_key: np.ndarray | None = None, receiver_key: np.ndarray | None = None,
    duplicate: np.ndarray | None = None,
) -> np.ndarray:
    """QC mask per trace of one chunk: uint16 [n], bits from :data:`FLAG_BITS`.

    samples: float32 [n, n_samples]; header arrays [n] (coordinates and
    offset in metres). Header arrays are keyword-only because several of the
    same shape are easy to swap by position. Duplicates: ``duplicate`` (bool
    [n], for example a slice of :func:`duplicate_traces` over the whole
    swath) wins; otherwise, with ``source_key`` and ``receiver_key``,
    duplicates within this chunk; otherwise none. The ``excluded`` bit is
    left to :func:`apply_exclusions`.
    """
    samples = np.asarray(samples)
    if samples.ndim != 2:
        raise ValueError(f"samples must be [n_traces, n_samples], got shape {samples.shape}")
    n = samples.shape[0]
    if duplicate is None:
        duplicate = (duplicate_traces(source_key, receiver_key) if source_key is not None
                     and receiver_key is not None else np.zeros(n, dtype=bool))
    return sample_flags(samples, clip_run=clip_run) | header_flags(
        source_x, source_y, receiver_x, receiver_y, offset,
        offset_tolerance_m=offset_tolerance_m, duplicate=duplicate)


def _mask(n: int, hits: dict[str, np.ndarray]) -> np.ndarray:
    mask = np.zeros(n, dtype=np.uint16)
    for name, hit in hits.items():
        mask[np.asarray(hit, bool)] |= np.uint16(FLAG_BITS[name])
    return mask


def sample_flags(samples: np.ndarray, *, clip_run: int, rows: int = 128) -> np.ndarray:
    """The flags that need the samples (dead, nan, clipped): uint16 [n] for
    float [n, n_samples]; computed where the samples are, chunk by chunk.

    The same flags as :func:`dead_traces`, :func:`nan_traces` and
    :func:`clipped_traces`, in one sweep over blocks of ``rows`` traces
    small enough to stay in cache (2.3x faster than the three whole-chunk
    passes on 4000 x 1500 float32, measured): per trace the largest and
    smallest sample give the NaN/Inf test (both propagate) and the peak
    ``p = max(hi, -lo)``. Only traces with at least two samples at ``|s| ==
    p`` on the grid of every ``clip_run // 2``-th sample can hold a run of
    ``clip_run`` peak samples (such a run covers at least two grid points),
    so the run count is done on those few alone.
    """
    if clip_run < 2:
        raise ValueError(f"clip_run = {clip_run}: a clipped run needs at least 2 samples")
    s = np.asarray(samples)
    if s.ndim != 2:
        raise ValueError(f"samples must be [n_traces, n_samples], got shape {s.shape}")
    n, ns = s.shape
    out = np.zeros(n, dtype=np.uint16)
    if ns == 0:
        out[:] = FLAG_BITS["dead"]
        return out
    step = clip_run // 2
    for a in range(0, n, rows):
        block = s[a: a + rows]
        mask = out[a: a + rows]
        hi, lo = block.max(axis=-1), block.min(axis=-1)
        with np.errstate(invalid="ignore"):
            bad = ~(np.isfinite(hi) & np.isfinite(lo))
            peak = np.maximum(hi, -lo)
        dead = peak == 0
        mask[dead] |= FLAG_BITS["dead"]
        mask[bad] |= FLAG_BITS["nan"]
        if ns < clip_run:
            continue
        on_grid = (np.abs(block[:, ::step]) == peak[:, None]).sum(axis=-1)
        cand = np.flatnonzero((on_grid >= 2) & ~bad & ~dead)
        if cand.size:
            mask[cand[clipped_traces(block[cand], clip_run=clip_run)]] |= FLAG_BITS["clipped"]
    return out


def header_flags(
    source_x: np.ndarray, source_y: np.ndarray, receiver_x: np.ndarray, receiver_y: np.ndarray,
    offset: np.ndarray, *, offset_tolerance_m: float, duplicate: np.ndarray,
) -> np.ndarray:
    """The flags that need only geometry (zero_xy, offset_mismatch,
    duplicate): uint16 [n]. ``duplicate`` bool [n] from
    :func:`duplicate_traces` over the whole swath. A trace without positions
    is zero_xy only, never also offset_mismatch."""
    missing = zero_xy_traces(source_x, source_y, receiver_x, receiver_y)
    mismatch = offset_mismatch_traces(offset, source_x, source_y, receiver_x, receiver_y,
                                      tolerance_m=offset_tolerance_m) & ~missing
    return _mask(len(missing), {"duplicate": duplicate, "zero_xy": missing, "offset_mismatch": mismatch})


def _in_ranges(trace_index: np.ndarray, ranges: np.ndarray) -> np.ndarray:
    """bool [n]: ``start <= index < stop`` for some row of ``ranges`` [k, 2]."""
    if ranges.size == 0:
        return np.zeros(trace_index.shape, dtype=bool)
    order = np.argsort(ranges[:, 0], kind="stable")
    starts = ranges[order, 0]
    reach = np.maximum.accumulate(ranges[order, 1])  # furthest stop of any range begun so far
    pos = np.searchsorted(starts, trace_index, side="right") - 1
    hit = pos >= 0
    hit[hit] = trace_index[hit] < reach[pos[hit]]
    return hit


def apply_exclusions(
    mask: np.ndarray, *, source_key: np.ndarray | None = None, receiver_key: np.ndarray | None = None,
    field_record: np.ndarray | None = None, trace_index: np.ndarray | None = None,
    exclude_sources: Sequence[int] | np.ndarray = (), exclude_receivers: Sequence[int] | np.ndarray = (),
    exclude_field_records: Sequence[int] | np.ndarray = (), exclude_ranges: np.ndarray | Sequence = (),
) -> np.ndarray:
    """Set the ``excluded`` bit of traces the user excluded; returns a new uint16 [n].

    source_key, receiver_key: int64 [n] station keys (or indices: whichever
    the exclusion lists use); field_record: int [n]; trace_index: int [n]
    position of each trace in its swath. exclude_ranges: int [k, 2] rows
    ``(start, stop)``, half open, in swath positions, for this swath only.
    An exclusion list whose per-trace array is not given raises ValueError.
    """
    out = np.array(mask, dtype=np.uint16, copy=True)
    hit = np.zeros(out.shape, dtype=bool)
    for values, listed, what in ((source_key, exclude_sources, "source_key"),
                                 (receiver_key, exclude_receivers, "receiver_key"),
                                 (field_record, exclude_field_records, "field_record")):
        listed = np.asarray(listed, dtype=np.int64).ravel()
        if listed.size == 0:
            continue
        if values is None:
            raise ValueError(f"apply_exclusions: an exclusion list needs the per-trace {what} array")
        hit |= np.isin(np.asarray(values, np.int64), listed)
    ranges = np.asarray(exclude_ranges, dtype=np.int64).reshape(-1, 2)
    if ranges.size:
        if trace_index is None:
            raise ValueError("apply_exclusions: trace ranges need the per-trace trace_index array")
        hit |= _in_ranges(np.asarray(trace_index, np.int64), ranges)
    out[hit] |= np.uint16(FLAG_BITS["excluded"])
    return out


def flag_bits(names: Iterable[str]) -> int:
    """OR of the bits of flag ``names``; unknown names raise ValueError."""
    bits = 0
    for name in names:
        if name not in FLAG_BITS:
            raise ValueError(f"unknown QC flag {name!r}; expected one of {list(FLAG_BITS)}")
        bits |= FLAG_BITS[name]
    return bits


def flag_names(mask: int) -> list[str]:
    """Names of the flags set in one mask value, in :data:`FLAG_BITS` order."""
    m = int(mask)
    return [name for name, bit in FLAG_BITS.items() if m & bit]


def join_flags(mask: int) -> str:
    """Flags of one mask value joined with ``'|'`` (``''`` when none is set)."""
    return "|".join(flag_names(mask))


def flag_counts(mask: np.ndarray) -> dict[str, int]:
    """Number of traces carrying each flag: ``{name: count}`` in FLAG_BITS order."""
    m = np.asarray(mask, dtype=np.uint16)
    return {name: int(np.count_nonzero(m & np.uint16(bit))) for name, bit in FLAG_BITS.items()}


def excluded_traces(mask: np.ndarray, *, exclude_bits: int) -> np.ndarray:
    """bool [n]: the trace carries a flag in ``exclude_bits`` or the ``excluded`` bit."""
    bits = np.uint16(exclude_bits | FLAG_BITS["excluded"])
    return (np.asarray(mask, dtype=np.uint16) & bits) != 0


def raise_on_flags(mask: np.ndarray, *, error_bits: int, trace_index: np.ndarray | None = None) -> None:
    """Raise TraceQcError when a trace carries a flag whose policy is ``error``.

    The message names the flags, how many traces carry them and the first
    few trace positions (``trace_index`` [n] if given, else array positions).
    """
    m = np.asarray(mask, dtype=np.uint16)
    hit = (m & np.uint16(error_bits)) != 0
    if not hit.any():
        return
    where = np.flatnonzero(hit)
    positions = np.asarray(trace_index)[where] if trace_index is not None else where
    counts = {k: v for k, v in flag_counts(m[hit] & np.uint16(error_bits)).items() if v}
    raise TraceQcError(
        f"{where.size} trace(s) carry QC flags whose policy is 'error' ({counts}), first at "
        f"trace {positions[:5].tolist()}; fix the data, or set the policy to 'exclude' or 'keep'"
    )


def usable_traces(flags: np.ndarray, source_index: np.ndarray, receiver_index: np.ndarray, *,
                  exclude_bits: int) -> np.ndarray:
    """bool [n]: traces the estimation uses and the correction changes: no
    flag among ``exclude_bits`` (the policies set to exclude) and both a
    source and a receiver station (index >= 0). The ``excluded`` bit always
    excludes (:func:`excluded_traces`)."""
    return (~excluded_traces(flags, exclude_bits=exclude_bits)
            & (np.asarray(source_index) >= 0) & (np.asarray(receiver_index) >= 0))
