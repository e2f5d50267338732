"""Config sections ``geometry`` and ``qc`` of the survey config.

Pure models like :mod:`descatter.tasks.config`: every field has a
description and a unit; kernels never see these objects, flows turn them
into plain numbers (the methods below do the common conversions).

Default QC policies, and why:

- ``dead = "exclude"``: a zero trace has no spectrum; its log power is -inf.
- ``nan = "exclude"``: one NaN poisons every sum it enters.
- ``duplicate = "keep"``: a repeated source-receiver pair is most often a
  re-shot record, real data that only weighs that pair twice.
- ``zero_xy = "exclude"``: traces without positions would all snap to one
  phantom station at the origin and join the wrong pairs.
- ``offset_mismatch = "keep"``: geometry comes from coordinates; header
  offsets are often rounded or computed another way, so a mismatch is
  reported, not acted on.
- ``clipped = "keep"``: a clipped trace keeps its phase and most of its
  spectrum; dropping it is the user's call.
"""

from __future__ import annotations

from typing import Literal

import numpy as np
from pydantic import Field, field_validator, model_validator

from .config_base import _Section, _unit
from .errors import ConfigError
from .geometry import station_keys, station_keys_from_numbers
from .trace_qc import FLAG_BITS

Policy = Literal["exclude", "keep", "error"]


class GeometryConfig(_Section):
    """How stations, shots and geometry checks are derived from the headers."""

    station_id_from: Literal["coordinates", "station_numbers"] = Field(
        "coordinates",
        description="name stations by coordinates snapped to a grid, or by (line, point) station numbers",
        json_schema_extra=_unit("choice"),
    )
    snap_m: float = Field(
        1.0, gt=0.0,
        description="snapping grid for station identity from coordinates; well above twice the coordinate noise",
        json_schema_extra=_unit("m"),
    )
    station_number_step: float = Field(
        0.01, gt=0.0,
        description="resolution of line and point numbers when stations are named by numbers",
        json_schema_extra=_unit("station number"),
    )
    offset_tolerance_m: float = Field(
        3.0, ge=0.0,
        description="largest accepted difference between |header offset| and the source-receiver distance",
        json_schema_extra=_unit("m"),
    )
    fold_bin_m: tuple[float, float] = Field(
        (0.0, 0.0),
        description="CMP bin (inline, crossline) for fold statistics; 0 takes half the receiver "
                    "(inline) and half the source (crossline) station spacing",
        json_schema_extra=_unit("m"),
    )
    sps_revision: Literal["2.1", "1.0"] = Field(
        "2.1", description="SEG SPS revision of the S/R/X geometry files, if any",
        json_schema_extra=_unit("revision"),
    )
    sps_columns: dict[str, tuple[int, int]] = Field(
        default_factory=dict,
        description="SPS column overrides, field name -> [first, last] column (1-based, inclusive)",
        json_schema_extra=_unit("column"),
    )

    @field_validator("fold_bin_m")
    @classmethod
    def _bins(cls, value: tuple[float, float]) -> tuple[float, float]:
        if any(v < 0 for v in value):
            raise ValueError(f"geometry.fold_bin_m = {list(value)}: bin sizes must be >= 0 (0 = automatic)")
        return value

    @field_validator("sps_columns")
    @classmethod
    def _columns(cls, value: dict[str, tuple[int, int]]) -> dict[str, tuple[int, int]]:
        for name, (first, last) in value.items():
            if not 2 <= first <= last:
                raise ValueError(
                    f"geometry.sps_columns.{name} = [{first}, {last}]: expected 2 <= first <= last "
                    "(column 1 holds the record type)"
                )
        return value


class TraceRange(_Section):
    """Traces ``start <= position < stop`` of one swath (0-based, stop exclusive)."""

    swath: str = Field(..., min_length=1, description="swath name (the file stem)",
                       json_schema_extra=_unit("name"))
    start: int = Field(..., ge=0, description="first trace position in the swath, 0-based",
                       json_schema_extra=_unit("trace"))
    stop: int = Field(..., ge=1, description="trace position after the last excluded one",
                      json_schema_extra=_unit("trace"))

    @model_validator(mode="after")
    def _ordered(self) -> "TraceRange":
        if self.stop <= self.start:
            raise ValueError(f"qc.exclude_traces: stop = {self.stop} must exceed start = {self.start}")
        return self


class StationRef(_Section):
    """One station, by key, by (line, point) numbers, or by (x, y) position."""

    key: int | None = Field(None, description="station key as shown in reports", json_schema_extra=_unit("key"))
    line: float | None = Field(None, description="station line number", json_schema_extra=_unit("station number"))
    point: float | None = Field(None, description="station point number", json_schema_extra=_unit("station number"))
    x: float | None = Field(None, description="easting", json_schema_extra=_unit("m"))
    y: float | None = Field(None, description="northing", json_schema_extra=_unit("m"))

    @model_validator(mode="after")
    def _one_way(self) -> "StationRef":
        given = {"key": self.key is not None, "line/point": self.line is not None or self.point is not None,
                 "x/y": self.x is not None or self.y is not None}
        if sum(given.values()) != 1:
            raise ValueError(
                f"a station needs exactly one of key, line/point or x/y; got {self.model_dump(exclude_none=True)}"
            )
        if given["line/point"] and (self.line is None or self.point is None):
            raise ValueError(f"a station by number needs both line and point; got {self.model_dump(exclude_none=True)}")
        if given["x/y"] and (self.x is None or self.y is None):
            raise ValueError(f"a station by position needs both x and y; got {self.model_dump(exclude_none=True)}")
        return self


_POLICY_HELP = "what to do with traces carrying the {} flag: exclude, keep or error"


class QcConfig(_Section):
    """Trace QC policies and the user's exclusion lists."""

    dead: Policy = Field("exclude", description=_POLICY_HELP.format("dead (all zero)"),
                         json_schema_extra=_unit("policy"))
    nan: Policy = Field("exclude", description=_POLICY_HELP.format("nan (NaN or Inf samples)"),
                        json_schema_extra=_unit("policy"))
    duplicate: Policy = Field("keep", description=_POLICY_HELP.format("duplicate (repeated source-receiver pair)"),
                              json_schema_extra=_unit("policy"))
    zero_xy: Policy = Field("exclude", description=_POLICY_HELP.format("zero_xy (missing coordinates)"),
                            json_schema_extra=_unit("policy"))
    offset_mismatch: Policy = Field("keep", description=_POLICY_HELP.format("offset_mismatch"),
                                    json_schema_extra=_unit("policy"))
    clipped: Policy = Field("keep", description=_POLICY_HELP.format("clipped"), json_schema_extra=_unit("policy"))
    clip_run: int = Field(
        4, ge=2, description="consecutive samples at a trace's peak |value| that make it clipped",
        json_schema_extra=_unit("samples"),
    )
    exclude_sources: list[StationRef] = Field(
        default_factory=list, description="source stations to leave out", json_schema_extra=_unit("station"))
    exclude_receivers: list[StationRef] = Field(
        default_factory=list, description="receiver stations to leave out", json_schema_extra=_unit("station"))
    exclude_field_records: list[int] = Field(
        default_factory=list, description="field records to leave out", json_schema_extra=_unit("field record"))
    exclude_traces: list[TraceRange] = Field(
        default_factory=list, description="trace ranges to leave out", json_schema_extra=_unit("trace"))

    def _bits(self, policy: str) -> int:
        return sum(bit for name, bit in FLAG_BITS.items() if getattr(self, name, None) == policy)

    def exclude_bits(self) -> int:
        """Mask bits whose policy is ``exclude`` (the ``excluded`` bit is always excluded)."""
        return self._bits("exclude") | FLAG_BITS["excluded"]

    def error_bits(self) -> int:
        """Mask bits whose policy is ``error``."""
        return self._bits("error")

    def trace_ranges(self, swath: str) -> np.ndarray:
        """int64 [k, 2] ``(start, stop)`` rows of ``exclude_traces`` for one swath."""
        rows = [(r.start, r.stop) for r in self.exclude_traces if r.swath == swath]
        return np.array(rows, dtype=np.int64).reshape(-1, 2)

    def source_keys(self, geometry: GeometryConfig) -> np.ndarray:
        """int64 keys of ``exclude_sources`` under ``geometry``'s station naming."""
        return _station_ref_keys(self.exclude_sources, geometry, "qc.exclude_sources")

    def receiver_keys(self, geometry: GeometryConfig) -> np.ndarray:
        """int64 keys of ``exclude_receivers`` under ``geometry``'s station naming."""
        return _station_ref_keys(self.exclude_receivers, geometry, "qc.exclude_receivers")


def _station_ref_keys(refs: list[StationRef], geometry: GeometryConfig, where: str) -> np.ndarray:
    keys = []
    for n, ref in enumerate(refs):
        if ref.key is not None:
            keys.append(ref.key)
        elif ref.x is not None:
            if geometry.station_id_from != "coordinates":
                raise ConfigError(
                    f"{where}[{n}] names a station by x/y but geometry.station_id_from = "
                    f"'{geometry.station_id_from}'; give line/point or key instead"
                )
            keys.append(int(station_keys(np.array([ref.x]), np.array([ref.y]), snap_m=geometry.snap_m)[0]))
        else:
            if geometry.station_id_from != "station_numbers":
                raise ConfigError(
                    f"{where}[{n}] names a station by line/point but geometry.station_id_from = "
                    f"'{geometry.station_id_from}'; give x/y or key instead"
                )
            keys.append(int(station_keys_from_numbers(np.array([ref.line]), np.array([ref.point]),
                                                      step=geometry.station_number_step)[0]))
    return np.array(keys, dtype=np.int64)
