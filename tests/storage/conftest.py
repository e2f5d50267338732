"""Small SEG-Y files for the storage tests, made two independent ways.

``hand_segy`` packs every header field with ``struct`` at the byte position
printed in SEG-Y rev 1 (2002) / rev 2.0 (2017), with nothing of ours
involved; ``segyio_file`` has segyio (an independent reader and writer)
write the file.
"""

from __future__ import annotations

import math
import struct
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pytest
import segyio

from descatter.tasks.config import HeaderPositions


def ibm_word(x: float) -> int:
    """IBM single-precision word of ``x``, for values an IBM word holds exactly.

    A deliberately simple scalar reference for the vectorised codec:
    value = (-1)**s * F * 16**(E - 64), 1/16 <= F < 1 (IBM System/360
    Principles of Operation), F kept as 24 bits.
    """
    if x == 0:
        return 0x80000000 if math.copysign(1.0, x) < 0 else 0
    sign = 0x80000000 if x < 0 else 0
    a, e = abs(x), 64
    while a >= 1:
        a, e = a / 16, e + 1
    while a < 1 / 16:
        a, e = a * 16, e - 1
    frac = a * 2**24
    assert frac == int(frac), f"{x} is not exact in IBM floating point"
    return sign | (e << 24) | int(frac)


@dataclass
class HandFile:
    path: Path
    samples: np.ndarray  # float32 [n, ns], the values the file holds
    fields: dict[str, np.ndarray] = field(default_factory=dict)  # per-trace header values written


# bytes per sample and struct code of each format (SEG-Y rev 1 (2002), binary header 3225-3226)
_SAMPLE_CODES = {1: ("I", 4), 2: ("i", 4), 3: ("h", 2), 5: ("f", 4), 8: ("b", 1)}


def write_hand_segy(
    path: Path,
    *,
    order: str = ">",
    format_code: int = 5,
    n_samples: int = 8,
    interval_us: int = 2000,
    n_traces: int = 3,
    revision: tuple[int, int] = (1, 0),
    n_extended: int = 0,
    binary_extra: tuple[tuple[int, str, object], ...] = (),
    trace_extra: tuple[tuple[int | None, int, str, object], ...] = (),
    tail: bytes = b"",
    textual: bytes | None = None,
    measurement_system: int = 1,
) -> HandFile:
    """Write a SEG-Y file with struct only.

    ``binary_extra``: (1-based file byte, struct code, value) packed after the
    standard fields; ``trace_extra``: (trace or None for all, 1-based byte in
    the trace header, struct code, value).
    """
    binary = bytearray(400)

    def put(byte: int, code: str, value: object) -> None:
        struct.pack_into(order + code, binary, byte - 3201, value)

    put(3217, "H", interval_us)  # rev 1 (2002): sample interval, us
    put(3221, "H", n_samples)  # rev 1: samples per data trace
    put(3225, "h", format_code)  # rev 1: data sample format code
    put(3255, "h", measurement_system)  # rev 1: 1 metres, 2 feet
    binary[300], binary[301] = revision  # rev 2.0: 3501 major, 3502 minor (rev 1: 0x0100)
    put(3503, "h", 1)  # rev 1: fixed length trace flag
    put(3505, "h", n_extended)  # rev 1: number of 3200-byte extended textual headers
    for byte, code, value in binary_extra:
        put(byte, code, value)
    if textual is None:
        textual = "".join(f"C{i:2d} HAND MADE".ljust(80) for i in range(1, 41)).encode("cp037")
    rng = np.random.default_rng(7)
    fields = {
        "field_record": np.arange(n_traces, dtype=np.int32) + 1001,
        "channel": np.arange(n_traces, dtype=np.int32) % 7 + 1,
        "offset": (np.arange(n_traces, dtype=np.int32) - 1) * 25,
        "source_x": np.full(n_traces, 45_000_000, dtype=np.int32),
        "receiver_y": np.arange(n_traces, dtype=np.int32) * -3,
        "coordinate_scalar": np.full(n_traces, -100, dtype=np.int32),
    }
    code, width = _SAMPLE_CODES[format_code]
    if format_code in (1, 5):
        samples = (rng.integers(-2000, 2000, (n_traces, n_samples)) / 8).astype(np.float32)
    else:
        limit = {2: 2**24, 3: 2**15, 8: 2**7}[format_code]
        samples = rng.integers(-limit, limit, (n_traces, n_samples)).astype(np.float32)
    body = bytearray()
    for t in range(n_traces):
        header = bytearray(240)
        struct.pack_into(order + "i", header, 8, int(fields["field_record"][t]))  # rev 1: bytes 9-12
        struct.pack_into(order + "i", header, 12, int(fields["channel"][t]))  # rev 1: bytes 13-16
        struct.pack_into(order + "i", header, 36, int(fields["offset"][t]))  # rev 1: bytes 37-40
        struct.pack_into(order + "h", header, 70, int(fields["coordinate_scalar"][t]))  # rev 1: 71-72
        struct.pack_into(order + "i", header, 72, int(fields["source_x"][t]))  # rev 1: bytes 73-76
        struct.pack_into(order + "i", header, 84, int(fields["receiver_y"][t]))  # rev 1: bytes 85-88
        struct.pack_into(order + "H", header, 114, n_samples)  # rev 1: samples in this trace, 115-116
        struct.pack_into(order + "H", header, 116, interval_us)  # rev 1: sample interval, 117-118
        for which, byte, c, value in trace_extra:
            if which is None or which == t:
                struct.pack_into(order + c, header, byte - 1, value)
        body += header
        values = samples[t]
        if format_code == 1:
            body += struct.pack(f"{order}{n_samples}I", *(ibm_word(float(v)) for v in values))
        elif format_code == 5:
            body += struct.pack(f"{order}{n_samples}f", *values.tolist())
        else:
            body += struct.pack(f"{order}{n_samples}{code}", *(int(v) for v in values))
    extended = b"".join(f"EXTENDED {i}".ljust(3200).encode("ascii") for i in range(max(n_extended, 0)))
    path.write_bytes(bytes(textual) + bytes(binary) + extended + bytes(body) + tail)
    return HandFile(path=path, samples=samples, fields=fields)


@pytest.fixture
def layout() -> dict[str, tuple[int, int]]:
    return HeaderPositions().layout()


@pytest.fixture
def hand_segy(tmp_path):
    """``hand_segy(name="x.sgy", **options)`` -> HandFile, see ``write_hand_segy``."""

    def make(name: str = "hand.sgy", **options) -> HandFile:
        return write_hand_segy(tmp_path / name, **options)

    return make


def write_segyio_file(path: Path, *, format_code: int, endian: str = "big", n_traces: int = 20,
                      n_samples: int = 50, interval_us: int = 4000) -> dict[str, np.ndarray]:
    """Have segyio write a file; return what it wrote (samples and header fields)."""
    rng = np.random.default_rng(11)
    spec = segyio.spec()
    spec.format = format_code
    spec.samples = np.arange(n_samples) * interval_us / 1000.0
    spec.tracecount = n_traces
    spec.endian = endian
    samples = (rng.standard_normal((n_traces, n_samples)) * 100).astype(np.float32)
    fields = {
        "field_record": rng.integers(1, 5000, n_traces),
        "channel": rng.integers(1, 1000, n_traces),
        "offset": rng.integers(-5000, 5000, n_traces),
        "source_x": rng.integers(-2**31, 2**31 - 1, n_traces),
        "receiver_y": rng.integers(0, 10**9, n_traces),
        "coordinate_scalar": np.full(n_traces, -10),
        "receiver_elevation": rng.integers(-500, 3000, n_traces),
    }
    tf = segyio.TraceField
    names = {"field_record": tf.FieldRecord, "channel": tf.TraceNumber, "offset": tf.offset,
             "source_x": tf.SourceX, "receiver_y": tf.GroupY, "coordinate_scalar": tf.SourceGroupScalar,
             "receiver_elevation": tf.ReceiverGroupElevation}
    with segyio.create(str(path), spec) as f:
        for i in range(n_traces):
            f.header[i] = {names[k]: int(v[i]) for k, v in fields.items()}
            f.trace[i] = samples[i]
        f.bin.update({segyio.BinField.MeasurementSystem: 1})
    return {"samples": samples, **{k: np.asarray(v) for k, v in fields.items()}}


@pytest.fixture(scope="module")
def segyio_files(tmp_path_factory) -> dict[tuple[int, str], tuple[Path, dict[str, np.ndarray]]]:
    """segyio-written files: IBM (1) and IEEE (5) big-endian, IEEE little-endian."""
    base = tmp_path_factory.mktemp("segyio")
    out = {}
    for code, endian in ((1, "big"), (5, "big"), (5, "little")):
        path = base / f"segyio_{code}_{endian}.sgy"
        out[code, endian] = (path, write_segyio_file(path, format_code=code, endian=endian))
    return out
