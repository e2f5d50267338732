"""SEG SPS (Shell Processing Support) geometry files: S, R and X records.

An SPS set is three fixed-column text files: source points (``S``
records), receiver points (``R``) and relations (``X``: which receivers a
field record's channels recorded, from which source point). ``H`` header
records are kept verbatim. Revisions 2.1 and the older 1.0 layout are read
and written; every column range can be overridden by name with a dict
``{field: (first, last)}``, 1-based and inclusive, as the standard counts.

The column tables below were written from memory of the SEG SPS standard
(rev 1.0 adopted by the SEG in 1993, rev 2.1 of 2006), not copied from the
document; check them against the standard before relying on a new
producer's files, and override where a file differs. Values marked
"uncertain" are the ones least sure.

Numbers: fields are read as literal decimals (a Fortran F10.2 field
without a decimal point is read as an integer, not with implied decimals).
Blank numeric fields read as NaN; blank point/source/receiver index and
increments read as 1. The writer right-justifies numbers and left-justifies
text; ``read(write(x)) == x`` for values representable in each field's
decimals (rev 2.1 F-formats; rev 1.0 writes up to the same decimals).
"""

from __future__ import annotations

import os
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from functools import cached_property
from pathlib import Path

import numpy as np

from descatter.tasks.errors import ConfigError, GeometryError, InputNotFoundError
from descatter.tasks.geometry import geometry_disagreement, station_keys_from_numbers

# --- column tables (from memory of the standard; see module docstring) ------

POINT_COLUMNS: dict[str, dict[str, tuple[int, int]]] = {
    "2.1": {
        "line": (2, 11),          # F10.2
        "point": (12, 21),        # F10.2; columns 22-23 blank
        "point_index": (24, 24),  # I1
        "point_code": (25, 26),   # A2
        "static": (27, 30),       # I4, ms
        "point_depth": (31, 34),  # F4.1, m (decimals uncertain)
        "datum": (35, 38),        # I4, m
        "uphole_time": (39, 40),  # I2, ms
        "water_depth": (41, 46),  # F6.1, m (decimals uncertain)
        "easting": (47, 55),      # F9.1
        "northing": (56, 65),     # F10.1
        "elevation": (66, 71),    # F6.1
        "day_of_year": (72, 74),  # I3
        "time": (75, 80),         # 3I2 hhmmss
    },
    "1.0": {
        "line": (2, 17),          # A16 (justification uncertain)
        "point": (18, 25),        # A8
        "point_index": (26, 26),  # I1
        "point_code": (27, 28),   # A2
        "static": (29, 32),       # I4
        "point_depth": (33, 36),  # I4 or F4.1 (uncertain)
        "datum": (37, 40),        # I4
        "uphole_time": (41, 42),  # I2
        "water_depth": (43, 46),  # I4 or F4.1 (uncertain)
        "easting": (47, 55),      # F9.1
        "northing": (56, 65),     # F10.1
        "elevation": (66, 71),    # F6.1
        "day_of_year": (72, 74),  # I3
        "time": (75, 80),         # 3I2
    },
}

RELATION_COLUMNS: dict[str, dict[str, tuple[int, int]]] = {
    "2.1": {
        "field_tape": (2, 7),               # 3A2
        "field_record": (8, 15),            # I8
        "field_record_increment": (16, 16), # I1 (kept, not expanded: meaning uncertain)
        "instrument_code": (17, 17),        # A1
        "source_line": (18, 27),            # F10.2
        "source_point": (28, 37),           # F10.2
        "source_index": (38, 38),           # I1
        "from_channel": (39, 43),           # I5
        "to_channel": (44, 48),             # I5
        "channel_increment": (49, 49),      # I1
        "receiver_line": (50, 59),          # F10.2
        "from_receiver": (60, 69),          # F10.2
        "to_receiver": (70, 79),            # F10.2
        "receiver_index": (80, 80),         # I1
    },
    "1.0": {
        "field_tape": (2, 7),               # 3A2
        "field_record": (8, 11),            # I4
        "field_record_increment": (12, 12), # I1
        "instrument_code": (13, 13),        # A1
        "source_line": (14, 29),            # A16
        "source_point": (30, 37),           # A8
        "source_index": (38, 38),           # I1
        "from_channel": (39, 42),           # I4
        "to_channel": (43, 46),             # I4
        "channel_increment": (47, 47),      # I1
        "receiver_line": (48, 63),          # A16
        "from_receiver": (64, 71),          # A8
        "to_receiver": (72, 79),            # A8
        "receiver_index": (80, 80),         # I1
    },
}

# kind: "num" float64 (NaN blank), "whole" float64 written as an integer,
# "index" int64 (blank -> 1), "count" int64 (required), "text" str.
# Second item: decimals written (None for non-decimal kinds).
_POINT_SPEC: dict[str, tuple[str, int | None]] = {
    "line": ("num", 2), "point": ("num", 2), "point_index": ("index", None), "point_code": ("text", None),
    "static": ("whole", None), "point_depth": ("num", 1), "datum": ("whole", None),
    "uphole_time": ("whole", None), "water_depth": ("num", 1), "easting": ("num", 1),
    "northing": ("num", 1), "elevation": ("num", 1), "day_of_year": ("whole", None), "time": ("text", None),
}
_RELATION_SPEC: dict[str, tuple[str, int | None]] = {
    "field_tape": ("text", None), "field_record": ("count", None), "field_record_increment": ("index", None),
    "instrument_code": ("text", None), "source_line": ("num", 2), "source_point": ("num", 2),
    "source_index": ("index", None), "from_channel": ("count", None), "to_channel": ("count", None),
    "channel_increment": ("index", None), "receiver_line": ("num", 2), "from_receiver": ("num", 2),
    "to_receiver": ("num", 2), "receiver_index": ("index", None),
}
_POINT_REQUIRED = ("line", "point", "easting", "northing")
_RELATION_REQUIRED = ("field_record", "source_line", "source_point", "from_channel", "to_channel",
                      "receiver_line", "from_receiver", "to_receiver")
_CHANNEL_BITS = 20  # channels up to 99999 (I5) fit; field records above them


def _columns(table: dict[str, dict[str, tuple[int, int]]], revision: str,
             overrides: Mapping[str, tuple[int, int]] | None, others: Sequence[str]) -> dict[str, tuple[int, int]]:
    if revision not in table:
        raise ConfigError(f"SPS revision {revision!r}: expected one of {sorted(table)}")
    cols = dict(table[revision])
    for name, rng in (overrides or {}).items():
        if name in cols:
            first, last = (int(v) for v in rng)
            if not 2 <= first <= last:
                raise ConfigError(f"SPS column override {name} = {rng}: expected 2 <= first <= last")
            cols[name] = (first, last)
        elif name not in others:
            raise ConfigError(
                f"SPS column override names unknown field {name!r}; fields are "
                f"{sorted(set(cols) | set(others))}"
            )
    return cols


def _convert(values: np.ndarray | Sequence | None, kind: str, n: int, name: str) -> np.ndarray:
    if values is None:
        if kind == "count":
            raise GeometryError(f"SPS field {name} is required")
        return {"text": np.full(n, "", dtype="U1"), "index": np.ones(n, np.int64)}.get(kind, np.full(n, np.nan))
    arr = np.asarray(values)
    if arr.shape != (n,):
        raise GeometryError(f"SPS field {name}: expected shape ({n},), got {arr.shape}")
    if kind == "text":
        return arr.astype(str)
    return arr.astype(np.int64 if kind in ("index", "count") else np.float64)


class _Records:
    _spec: dict[str, tuple[str, int | None]]
    _required: tuple[str, ...]

    def __init__(self, *, headers: Sequence[str] = (), file_lines: np.ndarray | None = None,
                 path: str | os.PathLike | None = None, **fields: object) -> None:
        unknown = set(fields) - set(self._spec)
        if unknown:
            raise GeometryError(f"unknown SPS field(s) {sorted(unknown)}; expected {list(self._spec)}")
        for name in self._required:
            if fields.get(name) is None:
                raise GeometryError(f"SPS field {name} is required")
        n = len(np.asarray(fields[self._required[0]]))
        for name, (kind, _) in self._spec.items():
            setattr(self, name, _convert(fields.get(name), kind, n, name))
        self.headers = tuple(headers)
        self.file_lines = np.zeros(n, np.int64) if file_lines is None else np.asarray(file_lines, np.int64)
        self.path = None if path is None else str(path)

    def __len__(self) -> int:
        return len(getattr(self, self._required[0]))

    def fields(self) -> dict[str, np.ndarray]:
        """``{name: array}`` of every record field."""
        return {name: getattr(self, name) for name in self._spec}

    def where(self, row: int) -> str:
        """``path:line`` of record ``row`` for messages."""
        return f"{self.path or '<memory>'}:{int(self.file_lines[row]) or row + 1}"


class SpsPoints(_Records):
    """Source (``S``) or receiver (``R``) point records: one array [n] per field.

    Fields: line, point (float64), point_index (int64), point_code (str),
    static (ms), point_depth (m), datum (m), uphole_time (ms), water_depth
    (m), easting, northing, elevation (m) (float64, NaN when blank),
    day_of_year (float64), time (str ``hhmmss``).
    """

    _spec = _POINT_SPEC
    _required = _POINT_REQUIRED

    def __init__(self, record_type: str, **kwargs: object) -> None:
        if record_type not in ("S", "R"):
            raise GeometryError(f"SPS point records are 'S' or 'R', got {record_type!r}")
        self.record_type = record_type
        super().__init__(**kwargs)

    @cached_property
    def _lookup(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(unique (line, point) keys, sorted codes ``key rank * 16 + index``, row per code)."""
        if ((self.point_index < 0) | (self.point_index > 15)).any():
            bad = int(np.flatnonzero((self.point_index < 0) | (self.point_index > 15))[0])
            raise GeometryError(f"{self.where(bad)}: point index {self.point_index[bad]} outside 0-15")
        keys = station_keys_from_numbers(self.line, self.point, step=0.01)
        uk, rank = np.unique(keys, return_inverse=True)
        combined = rank.astype(np.int64) * 16 + self.point_index
        order = np.argsort(combined, kind="stable")
        codes = combined[order]
        repeat = np.flatnonzero(codes[1:] == codes[:-1])
        xyz = np.column_stack([self.easting, self.northing, self.elevation])
        for k in repeat:
            a, b = order[k], order[k + 1]
            if not np.array_equal(xyz[a], xyz[b], equal_nan=True):
                raise GeometryError(
                    f"{self.record_type} point line {self.line[a]}, point {self.point[a]}, index "
                    f"{self.point_index[a]} appears twice with different positions, at {self.where(a)} "
                    f"and {self.where(b)}; keep one, or give a re-surveyed point its own point index"
                )
        keep = np.ones(codes.size, dtype=bool)
        keep[repeat + 1] = False  # identical repeats: the first one stands
        return uk, codes[keep], order[keep]

    def rows_of(self, line: np.ndarray, point: np.ndarray, index: np.ndarray) -> np.ndarray:
        """Row of each (line, point, index) station: int64 [n], -1 where absent."""
        uk, codes, rows = self._lookup
        index = np.asarray(index, np.int64)
        if uk.size == 0:
            return np.full(index.shape, -1, dtype=np.int64)
        keys = station_keys_from_numbers(line, point, step=0.01)
        rank = np.minimum(np.searchsorted(uk, keys), uk.size - 1)
        ok = (uk[rank] == keys) & (index >= 0) & (index <= 15)
        combined = rank.astype(np.int64) * 16 + index
        at = np.minimum(np.searchsorted(codes, combined), codes.size - 1)
        ok &= codes[at] == combined
        return np.where(ok, rows[at], -1)


class SpsRelations(_Records):
    """Relation (``X``) records: one array [n] per field.

    Fields: field_tape (str), field_record (int64), field_record_increment
    (int64), instrument_code (str), source_line, source_point (float64),
    source_index, from_channel, to_channel, channel_increment (int64),
    receiver_line, from_receiver, to_receiver (float64), receiver_index
    (int64). Channels ``from_channel..to_channel`` step ``channel_increment``
    map linearly onto receiver points ``from_receiver..to_receiver``.
    """

    _spec = _RELATION_SPEC
    _required = _RELATION_REQUIRED

    @cached_property
    def _lookup(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(sorted start codes, row per code, high channel per code)."""
        lo = np.minimum(self.from_channel, self.to_channel)
        hi = np.maximum(self.from_channel, self.to_channel)
        if (lo < 0).any() or (hi >= 1 << _CHANNEL_BITS).any() or (self.field_record < 0).any():
            raise GeometryError(f"X records with negative numbers or channels beyond {1 << _CHANNEL_BITS}")
        if (self.channel_increment < 1).any():
            bad = int(np.flatnonzero(self.channel_increment < 1)[0])
            raise GeometryError(f"{self.where(bad)}: channel increment {self.channel_increment[bad]} must be >= 1")
        start = (self.field_record << _CHANNEL_BITS) + lo
        order = np.argsort(start, kind="stable")
        same_record = self.field_record[order][1:] == self.field_record[order][:-1]
        overlap = np.flatnonzero(same_record & (lo[order][1:] <= hi[order][:-1]))
        if overlap.size:
            a, b = order[overlap[0]], order[overlap[0] + 1]
            raise GeometryError(
                f"X records at {self.where(a)} and {self.where(b)} give field record "
                f"{self.field_record[a]} overlapping channel ranges {lo[a]}-{hi[a]} and {lo[b]}-{hi[b]}; "
                "each channel of a field record needs exactly one X record"
            )
        return start[order], order, hi[order]


@dataclass(frozen=True)
class SpsGeometry:
    """One SPS set: sources (S), receivers (R), relations (X) and the revision read."""

    sources: SpsPoints
    receivers: SpsPoints
    relations: SpsRelations
    revision: str = "2.1"


# --- reading -----------------------------------------------------------------


def _read_block(path: Path, record_type: str, width: int) -> tuple[list[str], np.ndarray, np.ndarray]:
    if not path.is_file():
        raise InputNotFoundError(f"SPS {record_type} file {path} does not exist; check the path given for it")
    tag = record_type.encode()
    headers, rows, numbers = [], [], []
    for no, line in enumerate(path.read_bytes().splitlines(), 1):
        head = line[:1]
        if head == tag:
            rows.append(line.ljust(width)[:width])
            numbers.append(no)
        elif head == b"H":
            headers.append(line.decode("latin-1"))
        elif line.strip():
            raise GeometryError(
                f"{path}:{no}: record type {head.decode('latin-1')!r} in an SPS {record_type} file; "
                f"expected '{record_type}' records or 'H' headers"
            )
    block = np.frombuffer(b"".join(rows), dtype=np.uint8).reshape(len(rows), width)
    return headers, block, np.array(numbers, dtype=np.int64)


def _parse_field(block: np.ndarray, name: str, kind: str, first: int, last: int,
                 where: Callable[[int], str], revision: str) -> tuple[np.ndarray, np.ndarray]:
    sub = np.ascontiguousarray(block[:, first - 1:last])
    blank = (sub == 32).all(axis=1)
    text = sub.view(f"S{last - first + 1}").ravel()
    if kind == "text":
        return np.char.strip(np.char.decode(text, "latin-1")), blank
    filled = np.where(blank, b"nan", text)
    try:
        values = filled.astype(np.float64)
        bad = ~blank & ~np.isfinite(values)
    except ValueError:
        values, bad = None, None
    if bad is None or bad.any():
        for row, t in enumerate(filled):
            try:
                ok = blank[row] or np.isfinite(float(t))
            except ValueError:
                ok = False
            if not ok:
                hint = (" (rev 1.0 allows alphanumeric line and point names; descatter needs numeric ones)"
                        if revision == "1.0" and name in ("line", "point", "source_line", "source_point",
                                                           "receiver_line", "from_receiver", "to_receiver") else "")
                raise GeometryError(
                    f"{where(row)}: columns {first}-{last} ({name}) hold {t.decode('latin-1')!r}, "
                    f"expected a number{hint}"
                )
    if kind in ("index", "count"):
        frac = ~blank & (values != np.round(values))
        if frac.any():
            row = int(np.flatnonzero(frac)[0])
            raise GeometryError(f"{where(row)}: columns {first}-{last} ({name}) hold {values[row]}, expected an integer")
        values = np.where(blank, 1, values).astype(np.int64)
    return values, blank


def _read_records(path: str | os.PathLike, record_type: str, spec: dict, required: tuple[str, ...],
                  cols: dict[str, tuple[int, int]], revision: str) -> dict:
    path = Path(path)
    width = max(80, max(last for _, last in cols.values()))
    headers, block, numbers = _read_block(path, record_type, width)

    def where(row: int) -> str:
        return f"{path}:{numbers[row]}"

    fields = {}
    for name, (first, last) in cols.items():
        values, blank = _parse_field(block, name, spec[name][0], first, last, where, revision)
        if name in required and blank.any():
            row = int(np.flatnonzero(blank)[0])
            raise GeometryError(f"{where(row)}: required field {name} (columns {first}-{last}) is blank")
        fields[name] = values
    return dict(fields, headers=headers, file_lines=numbers, path=str(path))


def read_sps(path_s: str | os.PathLike, path_r: str | os.PathLike, path_x: str | os.PathLike, *,
             revision: str = "2.1", columns: Mapping[str, tuple[int, int]] | None = None) -> SpsGeometry:
    """Read an SPS set: source, receiver and relation files.

    columns: optional overrides ``{field: (first, last)}`` for point or
    relation fields (1-based inclusive). Raises InputNotFoundError for a
    missing file and GeometryError, naming the file and line, for a
    malformed record; ConfigError for an unknown revision or column name.
    """
    pcols = _columns(POINT_COLUMNS, revision, columns, others=tuple(_RELATION_SPEC))
    xcols = _columns(RELATION_COLUMNS, revision, columns, others=tuple(_POINT_SPEC))
    sources = SpsPoints("S", **_read_records(path_s, "S", _POINT_SPEC, _POINT_REQUIRED, pcols, revision))
    receivers = SpsPoints("R", **_read_records(path_r, "R", _POINT_SPEC, _POINT_REQUIRED, pcols, revision))
    relations = SpsRelations(**_read_records(path_x, "X", _RELATION_SPEC, _RELATION_REQUIRED, xcols, revision))
    return SpsGeometry(sources, receivers, relations, revision)


# --- writing -----------------------------------------------------------------


def _format_field(values: np.ndarray, kind: str, decimals: int | None, compact: bool) -> np.ndarray:
    if kind == "text":
        return np.asarray(values).astype(str)
    if kind in ("index", "count"):
        return np.char.mod("%d", np.asarray(values, np.int64))
    v = np.asarray(values, np.float64)
    blank = ~np.isfinite(v)
    safe = np.where(blank, 0.0, v)
    if kind == "whole":
        out = np.char.mod("%d", np.round(safe).astype(np.int64))
    else:
        out = np.char.mod(f"%.{decimals}f", safe)
        if compact:
            out = np.char.rstrip(np.char.rstrip(out, "0"), ".")
            out = np.where(out == "-0", "0", out)
    return np.where(blank, "", out)


def _format_block(records: _Records, record_type: str, spec: dict, cols: dict[str, tuple[int, int]],
                  revision: str) -> bytes:
    n = len(records)
    width = max(80, max(last for _, last in cols.values()))
    block = np.full((n, width + 1), ord(" "), dtype=np.uint8)
    block[:, 0] = ord(record_type)
    block[:, -1] = ord("\n")
    for name, (first, last) in cols.items():
        kind, decimals = spec[name]
        w = last - first + 1
        text = np.char.encode(_format_field(getattr(records, name), kind, decimals, revision == "1.0"), "latin-1")
        too_wide = np.char.str_len(text) > w
        if too_wide.any():
            row = int(np.flatnonzero(too_wide)[0])
            raise GeometryError(
                f"{record_type} record {row}: {name} = {getattr(records, name)[row].item()!r} does not fit columns "
                f"{first}-{last} ({w} characters) of SPS rev {revision}"
            )
        just = np.char.ljust(text, w) if kind == "text" else np.char.rjust(text, w)
        block[:, first - 1:last] = np.frombuffer(just.astype(f"S{w}").tobytes(), np.uint8).reshape(n, w)
    head = b""
    for h in records.headers:
        if not h.startswith("H"):
            raise GeometryError(f"SPS header records start with 'H', got {h[:20]!r}")
        head += h.rstrip("\r\n").encode("latin-1") + b"\n"
    return head + block.tobytes()


def _write_atomic(path: Path, data: bytes) -> None:
    tmp = path.with_name(path.name + ".partial")
    tmp.write_bytes(data)
    os.replace(tmp, path)


def write_sps(dir_or_paths: str | os.PathLike | Sequence[str | os.PathLike], sources: SpsPoints,
              receivers: SpsPoints, relations: SpsRelations, *, revision: str = "2.1",
              columns: Mapping[str, tuple[int, int]] | None = None) -> tuple[Path, Path, Path]:
    """Write an SPS set; returns the (S, R, X) paths written.

    dir_or_paths: a directory (created if needed; files ``sources.s``,
    ``receivers.r``, ``relations.x``) or three paths. Each file is written
    to a temporary name and renamed. Inverse of :func:`read_sps` for
    values that fit each field's decimals and width; a value too wide for
    its columns raises GeometryError.
    """
    if isinstance(dir_or_paths, (str, os.PathLike)):
        folder = Path(dir_or_paths)
        folder.mkdir(parents=True, exist_ok=True)
        paths = (folder / "sources.s", folder / "receivers.r", folder / "relations.x")
    else:
        paths = tuple(Path(p) for p in dir_or_paths)
        if len(paths) != 3:
            raise GeometryError(f"write_sps needs a directory or three paths (S, R, X), got {len(paths)}")
    pcols = _columns(POINT_COLUMNS, revision, columns, others=tuple(_RELATION_SPEC))
    xcols = _columns(RELATION_COLUMNS, revision, columns, others=tuple(_POINT_SPEC))
    blobs = (_format_block(sources, "S", _POINT_SPEC, pcols, revision),
             _format_block(receivers, "R", _POINT_SPEC, pcols, revision),
             _format_block(relations, "X", _RELATION_SPEC, xcols, revision))
    for path, blob in zip(paths, blobs):
        _write_atomic(path, blob)
    return paths


# --- per-trace geometry through X records ------------------------------------


def sps_trace_geometry(sps: SpsGeometry, field_record: np.ndarray, channel: np.ndarray) -> dict[str, np.ndarray]:
    """Per-trace source and receiver positions from an SPS set.

    field_record, channel: int [n] from the trace headers. Each trace is
    matched to the X record of its field record whose channel range holds
    it (on the channel increment), its receiver point interpolated linearly
    between from_receiver and to_receiver and rounded to 0.01, and its
    stations looked up by (line, point, index) in the R and S records.
    Returns float64 [n] ``source_x, source_y, source_elevation, receiver_x,
    receiver_y, receiver_elevation, source_line, source_point,
    receiver_line, receiver_point``, int64 [n] ``source_index,
    receiver_index`` and ``relation`` (row of the X record). Raises
    GeometryError naming the first traces without an X record, or X
    records whose stations are missing from the S or R file.
    """
    x = sps.relations
    fr = np.asarray(field_record, np.int64).ravel()
    ch = np.asarray(channel, np.int64).ravel()
    if len(x) == 0 and fr.size:
        raise GeometryError(
            f"the relation file {x.path or '(in memory)'} holds no X records; traces cannot be matched"
        )
    starts, rows, hi = x._lookup
    inside = (ch >= 0) & (ch < 1 << _CHANNEL_BITS) & (fr >= 0)
    at = np.searchsorted(starts, (fr << _CHANNEL_BITS) + ch, side="right") - 1
    ok = inside & (at >= 0)
    rel = np.where(ok, rows[np.maximum(at, 0)], 0)
    ok &= (x.field_record[rel] == fr) & (ch <= hi[np.maximum(at, 0)])
    ok &= (np.abs(ch - x.from_channel[rel]) % x.channel_increment[rel]) == 0
    if not ok.all():
        bad = np.flatnonzero(~ok)
        pairs = ", ".join(f"({fr[i]}, {ch[i]})" for i in bad[:5])
        raise GeometryError(
            f"{bad.size} trace(s) have no X record in {x.path or 'the relations'}: (field record, channel) "
            f"{pairs}; add the missing relations or exclude those field records"
        )
    span = (x.to_channel - x.from_channel)[rel]
    t = np.where(span != 0, (ch - x.from_channel[rel]) / np.where(span != 0, span, 1), 0.0)
    receiver_point = np.round(x.from_receiver[rel] + t * (x.to_receiver[rel] - x.from_receiver[rel]), 2)
    out = {"relation": rel.astype(np.int64), "source_line": x.source_line[rel], "source_point": x.source_point[rel],
           "source_index": x.source_index[rel], "receiver_line": x.receiver_line[rel],
           "receiver_point": receiver_point, "receiver_index": x.receiver_index[rel]}
    for role, points in (("source", sps.sources), ("receiver", sps.receivers)):
        row = points.rows_of(out[f"{role}_line"], out[f"{role}_point"], out[f"{role}_index"])
        if (row < 0).any():
            i = int(np.flatnonzero(row < 0)[0])
            raise GeometryError(
                f"X record at {x.where(rel[i])} names {role} line {out[f'{role}_line'][i]}, point "
                f"{out[f'{role}_point'][i]}, index {out[f'{role}_index'][i]}, which is not in the "
                f"{points.record_type} file {points.path or ''}".rstrip()
            )
        out[f"{role}_x"] = points.easting[row]
        out[f"{role}_y"] = points.northing[row]
        out[f"{role}_elevation"] = points.elevation[row]
    return out


def compare_with_headers(geometry: Mapping[str, np.ndarray], *, source_x: np.ndarray, source_y: np.ndarray,
                         receiver_x: np.ndarray, receiver_y: np.ndarray,
                         tolerance_m: float = 0.0) -> dict[str, np.ndarray]:
    """Traces whose SPS and header positions disagree by more than ``tolerance_m``.

    geometry: the result of :func:`sps_trace_geometry`; header coordinates
    float [n] metres. Returns, sorted largest disagreement first: ``trace``
    (int64 position), ``source_error_m``, ``receiver_error_m``, ``error_m``
    and the SPS ``source_line``, ``source_point``, ``receiver_line``,
    ``receiver_point`` of those traces.
    """
    report = geometry_disagreement(geometry["source_x"], geometry["source_y"], geometry["receiver_x"],
                                   geometry["receiver_y"], source_x, source_y, receiver_x, receiver_y,
                                   tolerance_m=tolerance_m)
    for name in ("source_line", "source_point", "receiver_line", "receiver_point"):
        report[name] = np.asarray(geometry[name])[report["trace"]]
    return report
