"""Geometry kernels: station identity, per-trace geometry, shots, layout.

Pure numpy: arrays in, arrays out, parameters keyword-only. Coordinates are
metres on a projected grid, ``x`` easting and ``y`` northing, float64.

Station keys
------------
A station key is an int64 that names a station the same way whatever swath
or trace order it was seen in. Two integers ``(i, j)`` are packed as

    key = i * 2**32 + (j + 2**31),    -2**31 <= i, j < 2**31

so keys sort like ``(i, j)`` lexicographically and unpack exactly
(``i = key >> 32``, ``j = (key & 0xFFFFFFFF) - 2**31``). From coordinates,
``i = floor(x / snap_m + 0.5)`` and ``j = floor(y / snap_m + 0.5)`` (round
half up, not numpy's half-to-even, so a tie always goes the same way). From
station numbers, ``i`` and ``j`` are the line and point numbers in units of
``step`` (SPS line and point numbers carry two decimals, hence 0.01).
Source and receiver keys live in separate tables; the two packings are never
mixed in one table.

Rounding boundary: two readings of one station get one key when both fall
in the same snapping cell. A surveyed position within ``margin`` of a cell
edge (``x / snap_m`` near ``k + 0.5``) can flip key under jitter smaller
than ``margin``; :func:`near_snap_boundary` finds such stations so a flow
can warn. Choose ``snap_m`` well above twice the coordinate noise.
"""

from __future__ import annotations

import numpy as np
from scipy.spatial import cKDTree

from .errors import GeometryError

_HALF = np.int64(1 << 31)
_LOW = np.int64(0xFFFFFFFF)

#: bits of a shot id that number the source positions of one field record
SHOT_SUB_BITS = 16


def _cell_index(u: np.ndarray, what: str) -> np.ndarray:
    """``floor(u)`` as int64, checked to fit the 32-bit halves of a key."""
    q = np.floor(np.asarray(u, dtype=np.float64))
    bad = ~np.isfinite(q) | (q < -_HALF) | (q >= _HALF)
    if bad.any():
        first = int(np.flatnonzero(bad.ravel())[0])
        raise GeometryError(
            f"{what}: value at position {first} is not finite or lies beyond 2**31 grid "
            "cells; fix the coordinates or use a coarser grid step"
        )
    return q.astype(np.int64)


def _grid_index(values: np.ndarray, step: float, what: str) -> np.ndarray:
    if not step > 0:
        raise GeometryError(f"{what}: grid step must be positive, got {step}")
    return _cell_index(np.asarray(values, dtype=np.float64) / step + 0.5, what)


def _pack(i: np.ndarray, j: np.ndarray) -> np.ndarray:
    return (i << np.int64(32)) | (j + _HALF)


def _unpack(keys: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    k = np.asarray(keys, dtype=np.int64)
    return k >> np.int64(32), (k & _LOW) - _HALF


def station_keys(x: np.ndarray, y: np.ndarray, *, snap_m: float) -> np.ndarray:
    """Order-independent station keys from coordinates.

    x, y: float [n], metres. Returns int64 [n],
    ``pack(floor(x/snap_m + 0.5), floor(y/snap_m + 0.5))`` (module docstring).
    Raises GeometryError for non-finite coordinates or ones beyond 2**31 cells.
    """
    x, y = np.broadcast_arrays(np.asarray(x, np.float64), np.asarray(y, np.float64))
    return _pack(_grid_index(x, snap_m, "station x"), _grid_index(y, snap_m, "station y"))


def station_keys_from_numbers(line: np.ndarray, point: np.ndarray, *, step: float = 0.01) -> np.ndarray:
    """Station keys from station numbers (line, point), for example SPS ones.

    line, point: float [n]. Returns int64 [n],
    ``pack(floor(line/step + 0.5), floor(point/step + 0.5))``.
    """
    line, point = np.broadcast_arrays(np.asarray(line, np.float64), np.asarray(point, np.float64))
    return _pack(_grid_index(line, step, "station line"), _grid_index(point, step, "station point"))


def station_key_coordinates(keys: np.ndarray, *, snap_m: float) -> tuple[np.ndarray, np.ndarray]:
    """Grid node ``(x, y)`` (float64 [n], metres) of coordinate keys.

    Inverse of :func:`station_keys` on grid nodes:
    ``station_keys(*station_key_coordinates(k, snap_m=s), snap_m=s) == k``.
    """
    i, j = _unpack(keys)
    return i * float(snap_m), j * float(snap_m)


def station_key_numbers(keys: np.ndarray, *, step: float = 0.01) -> tuple[np.ndarray, np.ndarray]:
    """``(line, point)`` (float64 [n]) of keys from :func:`station_keys_from_numbers`."""
    i, j = _unpack(keys)
    return i * float(step), j * float(step)


def near_snap_boundary(x: np.ndarray, y: np.ndarray, *, snap_m: float, margin_m: float) -> np.ndarray:
    """bool [n]: the coordinate lies within ``margin_m`` of a snapping-cell edge.

    Such a station may get a different key from a second reading jittered by
    less than ``margin_m``. x, y: float [n] metres. Distance to the nearest
    cell edge per axis: ``snap_m * (0.5 - |v/snap_m - floor(v/snap_m + 0.5)|)``.
    """
    out = np.zeros(np.broadcast(x, y).shape, dtype=bool)
    for v in (x, y):
        u = np.asarray(v, np.float64) / snap_m
        out |= snap_m * (0.5 - np.abs(u - np.floor(u + 0.5))) < margin_m
    return out


def assign_stations(keys: np.ndarray, known_keys: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Station index per trace against an append-only station table.

    keys: int64 [n], one station key per trace. known_keys: int64 [m], the
    table in index order (any order, unique). Returns ``(indices, new_keys)``:
    indices int64 [n] with ``table[indices] == keys`` for the grown table
    ``table = concatenate([known_keys, new_keys])``; new_keys int64 [k] holds
    the keys not in known_keys in order of first appearance in ``keys``.
    Known stations keep their index: the table is only ever appended to.
    """
    keys = np.asarray(keys, dtype=np.int64).ravel()
    known = np.asarray(known_keys, dtype=np.int64).ravel()
    m = known.size
    order = np.argsort(known, kind="stable")
    sorted_known = known[order]
    if m > 1 and (sorted_known[1:] == sorted_known[:-1]).any():
        dup = sorted_known[1:][sorted_known[1:] == sorted_known[:-1]][0]
        raise GeometryError(f"the known station table holds key {int(dup)} twice; a station table must be unique")
    pos = np.searchsorted(sorted_known, keys)
    found = np.zeros(keys.size, dtype=bool)
    inside = pos < m
    found[inside] = sorted_known[pos[inside]] == keys[inside]
    indices = np.empty(keys.size, dtype=np.int64)
    indices[found] = order[pos[found]]
    unseen = ~found
    uniq, first, inverse = np.unique(keys[unseen], return_index=True, return_inverse=True)
    appearance = np.argsort(first, kind="stable")
    rank = np.empty(uniq.size, dtype=np.int64)
    rank[appearance] = np.arange(uniq.size, dtype=np.int64)
    indices[unseen] = m + rank[inverse]
    return indices, uniq[appearance]


def station_means(indices: np.ndarray, values: np.ndarray, *, n_stations: int) -> np.ndarray:
    """Mean of a per-trace value per station: float64 [n_stations], NaN where no trace.

    indices: int [n] station index per trace; values: float [n]. Order of the
    traces changes the result only by float rounding.
    """
    idx = np.asarray(indices, dtype=np.int64).ravel()
    sums = np.bincount(idx, weights=np.asarray(values, np.float64).ravel(), minlength=n_stations)
    counts = np.bincount(idx, minlength=n_stations)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(counts > 0, sums / counts, np.nan)


def trace_geometry(
    source_x: np.ndarray, source_y: np.ndarray, receiver_x: np.ndarray, receiver_y: np.ndarray
) -> dict[str, np.ndarray]:
    """Offset, azimuth and midpoint per trace.

    All inputs float [n], metres. Returns float64 [n] arrays:
    ``offset = hypot(rx - sx, ry - sy)``;
    ``azimuth`` in degrees [0, 360), of the source-to-receiver vector,
    measured clockwise from north (+y): ``degrees(arctan2(rx - sx, ry - sy))
    mod 360`` (east first, north second; zero offset gives 0);
    ``cmp_x = (sx + rx) / 2``, ``cmp_y = (sy + ry) / 2``.
    """
    sx, sy, rx, ry = (np.asarray(a, dtype=np.float64) for a in (source_x, source_y, receiver_x, receiver_y))
    dx, dy = rx - sx, ry - sy
    azimuth = np.mod(np.degrees(np.arctan2(dx, dy)), 360.0)
    azimuth[azimuth >= 360.0] -= 360.0  # -tiny mod 360 rounds to 360.0
    return {
        "offset": np.hypot(dx, dy),
        "azimuth": azimuth,
        "cmp_x": 0.5 * (sx + rx),
        "cmp_y": 0.5 * (sy + ry),
    }


def shot_ids(field_record: np.ndarray, source_key: np.ndarray, *, on_conflict: str = "split") -> np.ndarray:
    """Shot identity per trace: one source station firing, named by field record.

    field_record: int [n]; source_key: int64 [n]. Returns int64 [n],
    ``shot = field_record * 2**SHOT_SUB_BITS + s`` where ``s`` is the rank of
    the trace's source key among the distinct source keys of its field
    record (sorted by key), so ``shot >> SHOT_SUB_BITS == field_record``.

    A field record with two source positions (simultaneous sources, a
    reused record number, a header error) becomes two shots with
    ``on_conflict="split"`` and raises GeometryError with ``"error"``. The
    rank depends on which traces are passed: to number shots consistently
    across chunks, pass the whole swath's arrays (a few bytes per trace).
    """
    if on_conflict not in ("split", "error"):
        raise GeometryError(f"on_conflict = {on_conflict!r}: expected 'split' or 'error'")
    fr = np.asarray(field_record, dtype=np.int64).ravel()
    sk = np.asarray(source_key, dtype=np.int64).ravel()
    if fr.size == 0:
        return np.empty(0, dtype=np.int64)
    order = np.lexsort((sk, fr))
    fr_s, sk_s = fr[order], sk[order]
    new_pair = np.ones(fr.size, dtype=bool)
    new_pair[1:] = (fr_s[1:] != fr_s[:-1]) | (sk_s[1:] != sk_s[:-1])
    new_record = np.ones(fr.size, dtype=bool)
    new_record[1:] = fr_s[1:] != fr_s[:-1]
    pair_no = np.cumsum(new_pair) - 1
    record_first_pair = np.maximum.accumulate(np.where(new_record, pair_no, 0))
    sub = pair_no - record_first_pair
    if sub.max() >= (1 << SHOT_SUB_BITS):
        raise GeometryError(f"a field record has more than {1 << SHOT_SUB_BITS} source positions")
    if on_conflict == "error" and sub.max() > 0:
        bad = np.unique(fr_s[sub > 0])
        raise GeometryError(
            f"{bad.size} field record(s) have more than one source position, first "
            f"{bad[:5].tolist()}; fix the source coordinates or allow on_conflict='split'"
        )
    shots = np.empty(fr.size, dtype=np.int64)
    shots[order] = (fr_s << np.int64(SHOT_SUB_BITS)) + sub
    return shots


def shot_field_record(shot: np.ndarray) -> np.ndarray:
    """Field record (int64 [n]) of shot ids from :func:`shot_ids`."""
    return np.asarray(shot, dtype=np.int64) >> np.int64(SHOT_SUB_BITS)


def _axial_mode_deg(theta_deg: np.ndarray, window_deg: float = 15.0) -> float:
    """Dominant axial direction in [0, 180) of angles: histogram mode refined
    by the doubled-angle mean of the angles within ``window_deg`` of it."""
    a = np.mod(theta_deg, 180.0)
    hist, edges = np.histogram(a, bins=180, range=(0.0, 180.0))
    # circular smoothing so a direction on the 0/180 seam is not split
    smooth = hist + np.roll(hist, 1) + np.roll(hist, -1)
    mode = edges[int(np.argmax(smooth))] + 0.5
    near = np.abs(np.mod(a - mode + 90.0, 180.0) - 90.0) <= window_deg
    z = np.exp(2j * np.radians(a[near])).sum()
    return float(np.mod(np.degrees(np.angle(z)) / 2.0, 180.0))


def station_layout(x: np.ndarray, y: np.ndarray) -> dict[str, float]:
    """Line direction, station spacing and line spacing of one station set.

    x, y: float [n] station coordinates (repeats are merged). The line
    direction is the dominant direction of each station's nearest-neighbour
    vector (stations are closer along a line than across lines), found
    without assuming x or y. Returns ``n_stations``, ``line_azimuth_deg``
    in [0, 180) clockwise from north, ``station_spacing_m`` (median
    nearest-neighbour distance along that direction), ``n_lines`` and
    ``line_spacing_m`` (median gap between line positions across it; lines
    are split where stations sorted across lines jump by more than half a
    station spacing). NaN where undefined (fewer than two stations or lines).
    """
    pts = np.column_stack([np.asarray(x, np.float64).ravel(), np.asarray(y, np.float64).ravel()])
    pts = np.unique(pts[np.isfinite(pts).all(axis=1)], axis=0)
    out = {"n_stations": int(len(pts)), "line_azimuth_deg": np.nan, "station_spacing_m": np.nan,
           "n_lines": int(len(pts) > 0), "line_spacing_m": np.nan}
    if len(pts) < 2:
        return out
    dist, nbr = cKDTree(pts).query(pts, k=2)
    vec = pts[nbr[:, 1]] - pts
    theta = np.degrees(np.arctan2(vec[:, 0], vec[:, 1]))
    azimuth = _axial_mode_deg(theta)
    off = np.abs(np.mod(theta - azimuth + 90.0, 180.0) - 90.0)
    spacing = float(np.median(dist[off <= 15.0, 1]))
    a = np.radians(azimuth)
    across = np.sort(pts[:, 0] * np.cos(a) - pts[:, 1] * np.sin(a))
    cut = np.flatnonzero(np.diff(across) > 0.5 * spacing) + 1
    groups = np.split(across, cut)
    sizes = np.array([g.size for g in groups])
    # short stubs (a few offset stations) would pull the median gap down
    keep = sizes >= max(2, 0.1 * np.median(sizes))
    centres = np.array([np.median(g) for g, k in zip(groups, keep) if k])
    out.update(line_azimuth_deg=azimuth, station_spacing_m=spacing, n_lines=int(max(len(centres), 1)))
    if len(centres) > 1:
        out["line_spacing_m"] = float(np.median(np.diff(centres)))
    return out


def fold_counts(
    cmp_x: np.ndarray, cmp_y: np.ndarray, *, bin_m: tuple[float, float], azimuth_deg: float,
    origin_x: float, origin_y: float,
) -> tuple[np.ndarray, np.ndarray]:
    """CMP fold per occupied bin, additive over chunks.

    cmp_x, cmp_y: float [n]. Bins are ``bin_m = (inline, crossline)`` metres
    on a grid whose inline axis points along ``azimuth_deg`` (clockwise from
    north) and whose corner is ``(origin_x, origin_y)``:
    ``i = floor(((p - o) . u) / bin_inline)``, ``j = floor(((p - o) . v) / bin_crossline)``
    with ``u = (sin a, cos a)``, ``v = (cos a, -sin a)``. Returns
    ``(bin_keys, counts)``: int64 [k] sorted ``pack(i, j)`` keys and int64 [k]
    trace counts. Chunks combine with :func:`merge_fold_counts`.
    """
    a = np.radians(azimuth_deg)
    px = np.asarray(cmp_x, np.float64).ravel() - origin_x
    py = np.asarray(cmp_y, np.float64).ravel() - origin_y
    ok = np.isfinite(px) & np.isfinite(py)
    inline = px[ok] * np.sin(a) + py[ok] * np.cos(a)
    cross = px[ok] * np.cos(a) - py[ok] * np.sin(a)
    keys = _pack(_cell_index(inline / bin_m[0], "cmp inline"), _cell_index(cross / bin_m[1], "cmp crossline"))
    return np.unique(keys, return_counts=True)


def merge_fold_counts(bin_keys: np.ndarray, counts: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Sum fold counts given as concatenated ``(bin_keys, counts)`` of several chunks."""
    keys, inverse = np.unique(np.asarray(bin_keys, np.int64), return_inverse=True)
    return keys, np.bincount(inverse, weights=np.asarray(counts), minlength=keys.size).astype(np.int64)


def _azimuth_coverage_deg(azimuth: np.ndarray) -> float:
    a = np.unique(np.mod(azimuth[np.isfinite(azimuth)], 360.0))
    if a.size == 0:
        return np.nan
    gaps = np.diff(np.concatenate([a, [a[0] + 360.0]]))
    return float(360.0 - gaps.max())


def acquisition_summary(
    source_x: np.ndarray, source_y: np.ndarray, receiver_x: np.ndarray, receiver_y: np.ndarray,
    cmp_x: np.ndarray, cmp_y: np.ndarray, offset: np.ndarray, azimuth: np.ndarray, shot: np.ndarray,
    *, bin_m: tuple[float, float] | None = None,
) -> dict[str, float]:
    """Numbers a geophysicist checks first about a survey's geometry.

    source_x/_y, receiver_x/_y: float [n_s], [n_r] station coordinates (a
    per-trace copy works too: repeats are merged). cmp_x/_y, offset,
    azimuth, shot: [n] per trace, as from :func:`trace_geometry` and
    :func:`shot_ids`. Returns a flat dict: for ``source_`` and ``receiver_``
    the :func:`station_layout` numbers; ``n_shots``, ``n_traces``;
    ``offset_min_m``/``offset_max_m``; ``azimuth_min_deg``/``azimuth_max_deg``
    and ``azimuth_coverage_deg`` (360 minus the widest empty sector);
    fold over CMP bins: ``bin_inline_m``, ``bin_crossline_m`` (default half
    the receiver and half the source station spacing), ``bin_azimuth_deg``
    (receiver line direction), ``bin_origin_x``/``_y`` (half a bin before
    the lowest receiver station, so on-grid midpoints fall inside bins),
    ``n_bins`` occupied, ``fold_max``, ``fold_mean``, ``fold_median``.

    Holds per-trace arrays in memory; for a whole survey reduce
    :func:`fold_counts` chunk by chunk with the returned grid.
    """
    src = station_layout(source_x, source_y)
    rec = station_layout(receiver_x, receiver_y)
    out: dict[str, float] = {}
    for prefix, lay in (("source_", src), ("receiver_", rec)):
        out.update({prefix + k: v for k, v in lay.items()})
    offset = np.asarray(offset, np.float64)
    azimuth = np.asarray(azimuth, np.float64)
    fin_off, fin_az = offset[np.isfinite(offset)], azimuth[np.isfinite(azimuth)]
    out.update(
        n_shots=int(np.unique(np.asarray(shot)).size),
        n_traces=int(offset.size),
        offset_min_m=float(fin_off.min()) if fin_off.size else np.nan,
        offset_max_m=float(fin_off.max()) if fin_off.size else np.nan,
        azimuth_min_deg=float(fin_az.min()) if fin_az.size else np.nan,
        azimuth_max_deg=float(fin_az.max()) if fin_az.size else np.nan,
        azimuth_coverage_deg=_azimuth_coverage_deg(azimuth),
    )
    if bin_m is None:
        bin_m = (rec["station_spacing_m"] / 2.0, src["station_spacing_m"] / 2.0)
    azim = rec["line_azimuth_deg"] if np.isfinite(rec["line_azimuth_deg"]) else 0.0
    out.update(bin_inline_m=float(bin_m[0]), bin_crossline_m=float(bin_m[1]), bin_azimuth_deg=float(azim),
               n_bins=0, fold_max=0, fold_mean=np.nan, fold_median=np.nan, bin_origin_x=np.nan, bin_origin_y=np.nan)
    if not (np.isfinite(bin_m).all() and min(bin_m) > 0) or np.asarray(cmp_x).size == 0:
        return out
    a = np.radians(azim)
    rx, ry = np.asarray(receiver_x, np.float64).ravel(), np.asarray(receiver_y, np.float64).ravel()
    inline = rx * np.sin(a) + ry * np.cos(a)
    cross = rx * np.cos(a) - ry * np.sin(a)
    i0 = np.nanmin(inline) - bin_m[0] / 2.0
    j0 = np.nanmin(cross) - bin_m[1] / 2.0
    ox, oy = i0 * np.sin(a) + j0 * np.cos(a), i0 * np.cos(a) - j0 * np.sin(a)
    _, counts = fold_counts(cmp_x, cmp_y, bin_m=bin_m, azimuth_deg=azim, origin_x=ox, origin_y=oy)
    if counts.size:
        out.update(n_bins=int(counts.size), fold_max=int(counts.max()), fold_mean=float(counts.mean()),
                   fold_median=float(np.median(counts)), bin_origin_x=float(ox), bin_origin_y=float(oy))
    return out


def geometry_disagreement(
    a_source_x: np.ndarray, a_source_y: np.ndarray, a_receiver_x: np.ndarray, a_receiver_y: np.ndarray,
    b_source_x: np.ndarray, b_source_y: np.ndarray, b_receiver_x: np.ndarray, b_receiver_y: np.ndarray,
    *, tolerance_m: float = 0.0,
) -> dict[str, np.ndarray]:
    """Traces whose source or receiver position differs between two geometries.

    All inputs float [n], metres. ``source_error_m = hypot(a_sx - b_sx,
    a_sy - b_sy)``, likewise ``receiver_error_m``, ``error_m`` their maximum
    (NaN, where a position is missing, counts as infinitely wrong). Returns
    int64 ``trace`` positions and float64 errors for ``error_m >
    tolerance_m``, sorted largest error first (ties by trace position).
    """
    es = np.hypot(np.asarray(a_source_x, np.float64) - b_source_x, np.asarray(a_source_y, np.float64) - b_source_y)
    er = np.hypot(np.asarray(a_receiver_x, np.float64) - b_receiver_x,
                  np.asarray(a_receiver_y, np.float64) - b_receiver_y)
    es = np.where(np.isnan(es), np.inf, es)
    er = np.where(np.isnan(er), np.inf, er)
    err = np.maximum(es, er)
    trace = np.flatnonzero(err > tolerance_m)
    trace = trace[np.lexsort((trace, -err[trace]))]
    return {"trace": trace.astype(np.int64), "source_error_m": es[trace],
            "receiver_error_m": er[trace], "error_m": err[trace]}


def relation_runs(
    field_record: np.ndarray, channel: np.ndarray, receiver_line: np.ndarray, receiver_point: np.ndarray
) -> dict[str, np.ndarray]:
    """Compress per-trace (record, channel) -> (receiver line, point) into
    runs, the shape of SEG SPS relation (X) records.

    Inputs int/float [n]. A run is a maximal sequence of traces of one field
    record and one receiver line, in channel order, whose channel step is 1
    and whose receiver point changes by the same step at every channel.
    Returns int64/float64 arrays [n_runs]: ``field_record``, ``from_channel``,
    ``to_channel``, ``receiver_line``, ``from_receiver``, ``to_receiver``;
    expanding every run linearly gives back each trace's receiver point.
    """
    fr = np.asarray(field_record, np.int64)
    ch = np.asarray(channel, np.int64)
    line = np.asarray(receiver_line, np.float64)
    point = np.asarray(receiver_point, np.float64)
    order = np.lexsort((ch, fr))
    fr, ch, line, point = fr[order], ch[order], line[order], point[order]
    n = fr.size
    if n == 0:
        empty_i, empty_f = np.zeros(0, np.int64), np.zeros(0)
        return {"field_record": empty_i, "from_channel": empty_i, "to_channel": empty_i,
                "receiver_line": empty_f, "from_receiver": empty_f, "to_receiver": empty_f}
    step = np.diff(point)
    # A run breaks where the record or line changes or a channel is skipped
    # (same[i-1] false), or where the receiver step differs from the step
    # into the previous trace of the same run.
    same = (fr[1:] == fr[:-1]) & (line[1:] == line[:-1]) & (ch[1:] == ch[:-1] + 1)
    brk = np.ones(n, dtype=bool)
    brk[1:] = ~same
    if n > 2:
        brk[2:] |= same[:-1] & same[1:] & ~np.isclose(step[1:], step[:-1], rtol=0, atol=1e-6)
    starts = np.flatnonzero(brk)
    ends = np.concatenate([starts[1:], [n]]) - 1
    return {
        "field_record": fr[starts], "from_channel": ch[starts], "to_channel": ch[ends],
        "receiver_line": line[starts], "from_receiver": point[starts], "to_receiver": point[ends],
    }
