"""Geometry and QC of one swath: a pure kernel the single writer runs before commit.

Coordinates come from the trace headers (or from SEG SPS files); stations
are named by snapped coordinates (or SPS station numbers) and looked up in
the store's append-only station tables, so adding a swath never renumbers
or moves an earlier swath's stations. The per-trace QC mask joins the
sample flags written by the ingest chunks with the geometry flags and the
user's exclusions.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field

import numpy as np

from . import geometry as geo
from . import trace_qc
from .config import SurveyConfig
from .errors import ConfigError, TraceQcError

log = logging.getLogger(__name__)


@dataclass
class SwathGeometry:
    arrays: dict[str, np.ndarray]
    new_sources: dict[str, np.ndarray]
    new_receivers: dict[str, np.ndarray]
    flags: np.ndarray
    warnings: list[str] = field(default_factory=list)


def _keys(x, y, numbers, valid, config: SurveyConfig, what: str) -> np.ndarray:
    keys = np.full(len(x), -1, dtype=np.int64)
    g = config.geometry
    if g.station_id_from == "coordinates":
        keys[valid] = geo.station_keys(x[valid], y[valid], snap_m=g.snap_m)
    else:
        if numbers is None:
            raise ConfigError(
                "geometry.station_id_from = 'station_numbers' needs station numbers from SEG SPS files; "
                "load them with 'descatter geometry STORE --sps S R X' or name stations by coordinates"
            )
        line, point = numbers
        keys[valid] = geo.station_keys_from_numbers(line[valid], point[valid], step=g.station_number_step)
    return keys


def _new_rows(keys, x, y, z, indices, known_n: int, new_keys) -> dict[str, np.ndarray]:
    """Table rows (key, mean x, y, elevation) of the stations first seen here."""
    n_total = known_n + len(new_keys)
    ok = indices >= 0
    rows = {"key": np.asarray(new_keys, np.int64)}
    for name, values in (("x", x), ("y", y), ("elevation", z)):
        means = geo.station_means(indices[ok], values[ok], n_stations=n_total)
        rows[name] = means[known_n:]
    return rows


def swath_geometry(
    swath: str,
    headers: dict[str, np.ndarray],
    sample_flags: np.ndarray,
    config: SurveyConfig,
    *,
    known_sources: np.ndarray,
    known_receivers: np.ndarray,
    sps: dict[str, np.ndarray] | None = None,
) -> SwathGeometry:
    """Per-trace geometry, new station rows and the QC mask of one swath.

    ``headers``: the swath's decoded header fields (whole); ``sps``: per-trace
    positions and station numbers from :func:`storage.sps.sps_trace_geometry`
    to use instead of the header coordinates. ``known_*``: int64 keys of the
    committed station tables. Raises :class:`TraceQcError` when a flag whose
    policy is ``error`` is found. :func:`header_geometry`, then
    :func:`merge_sample_flags`.
    """
    geom = header_geometry(swath, headers, config, known_sources=known_sources, known_receivers=known_receivers,
                           sps=sps)
    flags, warnings = merge_sample_flags(swath, geom.flags, sample_flags, config)
    return SwathGeometry(geom.arrays, geom.new_sources, geom.new_receivers, flags, warnings + geom.warnings)


def merge_sample_flags(swath: str, geometry_flags: np.ndarray, sample_flags: np.ndarray,
                       config: SurveyConfig) -> tuple[np.ndarray, list[str]]:
    """The QC mask of a swath: the flags from its samples (dead, NaN, clipped)
    joined with those of :func:`header_geometry` (geometry flags, exclusions).

    Returns ``(flags uint16 [n], warnings)``, the warning counting the flagged
    traces; raises :class:`TraceQcError` for a flag whose policy is ``error``.
    """
    flags = np.asarray(sample_flags, np.uint16) | np.asarray(geometry_flags, np.uint16)
    try:
        trace_qc.raise_on_flags(flags, error_bits=config.qc.error_bits())
    except TraceQcError as exc:
        raise TraceQcError(f"swath {swath!r}: {exc}") from None
    counts = {k: v for k, v in trace_qc.flag_counts(flags).items() if v}
    warnings = [f"swath {swath!r}: flagged traces {counts} (see 'descatter qc')"] if counts else []
    return flags, warnings


def header_geometry(
    swath: str,
    headers: dict[str, np.ndarray],
    config: SurveyConfig,
    *,
    known_sources: np.ndarray,
    known_receivers: np.ndarray,
    sps: dict[str, np.ndarray] | None = None,
) -> SwathGeometry:
    """What :func:`swath_geometry` finds from the headers (or SPS) alone, without
    the samples: ``flags`` hold the geometry flags and the user's exclusions
    only, ``warnings`` the traces without coordinates. So the geometry of a
    swath can be built while its samples are still being read; join the
    sample flags with :func:`merge_sample_flags`.
    """
    src = sps if sps is not None else headers
    sx, sy = np.asarray(src["source_x"], float), np.asarray(src["source_y"], float)
    rx, ry = np.asarray(src["receiver_x"], float), np.asarray(src["receiver_y"], float)
    sz = np.asarray(src["source_elevation"], float)
    rz = np.asarray(src["receiver_elevation"], float)
    n = len(sx)
    missing = trace_qc.zero_xy_traces(sx, sy, rx, ry)
    valid = ~missing
    s_numbers = (sps["source_line"], sps["source_point"]) if sps is not None else None
    r_numbers = (sps["receiver_line"], sps["receiver_point"]) if sps is not None else None
    s_keys = _keys(sx, sy, s_numbers, valid, config, "source")
    r_keys = _keys(rx, ry, r_numbers, valid, config, "receiver")

    s_idx = np.full(n, -1, np.int64)
    r_idx = np.full(n, -1, np.int64)
    s_idx[valid], s_new = geo.assign_stations(s_keys[valid], known_sources)
    r_idx[valid], r_new = geo.assign_stations(r_keys[valid], known_receivers)
    new_sources = _new_rows(s_keys, sx, sy, sz, s_idx, len(known_sources), s_new)
    new_receivers = _new_rows(r_keys, rx, ry, rz, r_idx, len(known_receivers), r_new)

    tg = geo.trace_geometry(sx, sy, rx, ry)
    shot = geo.shot_ids(np.asarray(headers["field_record"], np.int64), s_keys)
    arrays = {
        "source_index": s_idx, "receiver_index": r_idx, "shot": shot,
        "source_x": sx, "source_y": sy, "receiver_x": rx, "receiver_y": ry,
        "offset": tg["offset"], "azimuth": tg["azimuth"], "cmp_x": tg["cmp_x"], "cmp_y": tg["cmp_y"],
    }

    duplicate = trace_qc.duplicate_traces(s_keys, r_keys) & valid
    flags = trace_qc.header_flags(
        sx, sy, rx, ry, np.asarray(headers["offset"], float),
        offset_tolerance_m=config.geometry.offset_tolerance_m, duplicate=duplicate)
    qc = config.qc
    flags = trace_qc.apply_exclusions(
        flags, source_key=s_keys, receiver_key=r_keys,
        field_record=np.asarray(headers["field_record"], np.int64), trace_index=np.arange(n),
        exclude_sources=qc.source_keys(config.geometry), exclude_receivers=qc.receiver_keys(config.geometry),
        exclude_field_records=qc.exclude_field_records, exclude_ranges=qc.trace_ranges(swath),
    )
    warnings = []
    if missing.any():
        warnings.append(f"swath {swath!r}: {int(missing.sum())} trace(s) without coordinates get no station")
    return SwathGeometry(arrays, new_sources, new_receivers, flags, warnings)
