"""Reading SEG-Y files: scan once, then read blocks of whole traces.

``scan_segy`` checks and describes a file from its headers alone (it never
reads samples); ``read_block`` returns samples, raw trace headers and a
digest of the raw bytes for a range of traces; ``decode_fields`` and
``scale_coordinates`` turn raw trace headers into numbers.

Standards: SEG-Y rev 1 (2002) and SEG-Y rev 2.0 (2017), both of the SEG
Technical Standards Committee. Trace indices in messages count from 0.
"""

from __future__ import annotations

import hashlib
import logging
import math
import os
import struct
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
from zlib_ng.zlib_ng import crc32

from descatter.storage.ibm import ibm_to_float32, ibm_to_float64
from descatter.storage.segy_headers import (
    BYTE_ORDER_WORD,
    FILE_HEADER_BYTES,
    TEXTUAL_BYTES,
    TRACE_HEADER_BYTES,
    binary_double,
    binary_field,
    decode_fields,
    header_column,
)
from descatter.tasks.errors import ConfigError, InputNotFoundError, SampleRangeError, SegyFormatError

__all__ = [
    "SUPPORTED_FORMATS",
    "SegyInfo",
    "decode_fields",
    "quick_fingerprint",
    "read_block",
    "read_trace_headers",
    "scale_coordinates",
    "ScaledCoordinates",
    "scan_segy",
    "textual_to_str",
]

logger = logging.getLogger(__name__)

#: Data sample format codes, SEG-Y rev 2.0 (2017) binary header bytes 3225-3226.
FORMAT_NAMES: dict[int, str] = {
    1: "4-byte IBM floating point",
    2: "4-byte two's complement integer",
    3: "2-byte two's complement integer",
    4: "4-byte fixed point with gain (obsolete)",
    5: "4-byte IEEE floating point",
    6: "8-byte IEEE floating point",
    7: "3-byte two's complement integer",
    8: "1-byte two's complement integer",
    9: "8-byte two's complement integer",
    10: "4-byte unsigned integer",
    11: "2-byte unsigned integer",
    12: "8-byte unsigned integer",
    15: "3-byte unsigned integer",
    16: "1-byte unsigned integer",
}
#: The codes this reader decodes: code -> (numpy kind and size, bytes per sample).
SUPPORTED_FORMATS: dict[int, tuple[str, int]] = {1: ("u4", 4), 2: ("i4", 4), 3: ("i2", 2), 5: ("f4", 4), 8: ("i1", 1)}

_DEFAULT_COUNT = (115, 2)  # SEG-Y rev 1 trace header: samples in this trace
_DEFAULT_INTERVAL = (117, 2)  # SEG-Y rev 1 trace header: sample interval (us)
_CHECK_TRACES = 1 << 18  # traces per step of whole-file header checks (bounds memory)
_FEET = 0.3048  # international foot, exact by definition (1959)


@dataclass(frozen=True)
class SegyInfo:
    """What ``scan_segy`` found: enough to read any trace without rescanning.

    ``textual``, ``extended_textual`` and ``binary`` are raw bytes as in the
    file; ``revision`` is (major, minor) from bytes 3501-3502;
    ``measurement_system`` is 1 (metres), 2 (feet) or 0 (not stated).
    """

    path: str
    size: int
    byte_order: str
    format_code: int
    sample_bytes: int
    n_samples: int
    sample_interval_us: int
    n_traces: int
    data_offset: int
    trace_bytes: int
    textual: bytes
    extended_textual: bytes
    binary: bytes
    revision: tuple[int, int]
    measurement_system: int
    textual_encoding: str

    @property
    def dt_s(self) -> float:
        """Sample interval in seconds."""
        return self.sample_interval_us * 1e-6

    @property
    def sample_dtype(self) -> np.dtype:
        """numpy dtype of one sample as stored (IBM words as unsigned 32-bit)."""
        kind, _ = SUPPORTED_FORMATS[self.format_code]
        return np.dtype((">" if self.byte_order == "big" else "<") + kind)


def _not_segy(path: str, why: str) -> SegyFormatError:
    return SegyFormatError(f"{path} is not a SEG-Y file: {why}")


def _detect_byte_order(path: str, binary: bytes) -> str:
    """Byte order from the rev 2.0 constant at 3297-3300, else from the format code.

    A valid code (1-16) read in the wrong order is a multiple of 256, so at
    most one order gives a plausible code.
    """
    word = binary[96:100]
    if int.from_bytes(word, "big") == BYTE_ORDER_WORD:
        return "big"
    if int.from_bytes(word, "little") == BYTE_ORDER_WORD:
        return "little"
    codes = {order: binary_field(binary, "format_code", order) for order in ("big", "little")}
    plausible = [order for order, code in codes.items() if code in FORMAT_NAMES]
    if not plausible:
        raise _not_segy(
            path,
            f"the data sample format code at bytes 3225-3226 reads {codes['big']} big-endian "
            f"and {codes['little']} little-endian; SEG-Y rev 2.0 codes are "
            f"{sorted(FORMAT_NAMES)}",
        )
    return plausible[0]


def _textual_encoding(raw: bytes) -> str:
    """``"ascii"`` or ``"ebcdic"``: whichever decoding gives more letters, digits and spaces."""
    wanted = set("ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789 ")
    ascii_score = sum(c in wanted for c in raw.decode("latin-1"))
    ebcdic_score = sum(c in wanted for c in raw.decode("cp037"))
    return "ascii" if ascii_score > ebcdic_score else "ebcdic"


def textual_to_str(raw: bytes) -> str:
    """Decode a textual header (3200 bytes, or n x 3200) to text.

    EBCDIC (code page 037, as SEG-Y rev 1 prescribes) or ASCII (allowed by
    rev 2.0), detected by which decoding gives more letters, digits and
    spaces. The text is cut into 80-column cards, one per line, each with
    trailing blanks and NULs removed.
    """
    text = raw.decode("cp037" if _textual_encoding(raw) == "ebcdic" else "latin-1")
    cards = [text[i : i + 80] for i in range(0, len(text), 80)]
    return "\n".join(card.replace("\x00", " ").rstrip() for card in cards)


def _field_or_default(layout: Mapping[str, tuple[int, int]], name: str, default: tuple[int, int]) -> tuple[int, int]:
    byte, width = layout.get(name, default)
    if width not in (2, 4) or not 1 <= byte <= TRACE_HEADER_BYTES + 1 - width:
        raise ConfigError(
            f"header layout {name} = (byte {byte}, width {width}): expected width 2 or 4 inside the "
            "240-byte trace header"
        )
    return int(byte), int(width)


def _rev2_fields(path: str, binary: bytes, order: str, n_ext: int) -> tuple[int, int, int]:
    """Check the rev 2.0 layout fields; return (samples, interval_us, traces), 0 when unset."""
    extra = binary_field(binary, "max_extra_trace_headers", order)
    if extra != 0:
        raise SegyFormatError(
            f"{path}: {extra} additional 240-byte trace headers per trace (binary header bytes "
            "3507-3510, SEG-Y rev 2.0) are not supported; export the file with standard trace headers only"
        )
    trailers = binary_field(binary, "n_trailer_stanzas", order)
    if trailers != 0:
        raise SegyFormatError(
            f"{path}: {trailers} data trailer stanzas (binary header bytes 3529-3532, SEG-Y rev 2.0; "
            "-1 means a variable number) are not supported; remove the trailer first"
        )
    first = binary_field(binary, "first_trace_offset", order, signed=False)
    standard = FILE_HEADER_BYTES + TEXTUAL_BYTES * n_ext
    if first not in (0, standard):
        raise SegyFormatError(
            f"{path}: the first trace starts at byte offset {first} (binary header bytes 3521-3528, "
            f"SEG-Y rev 2.0); only the standard position {standard} (after the textual, binary and "
            f"{n_ext} extended textual headers) is supported"
        )
    samples = binary_field(binary, "ext_n_samples", order)
    interval = binary_double(binary, "ext_sample_interval", order)
    interval_us = 0
    if interval != 0.0:
        if not math.isfinite(interval) or interval <= 0 or abs(interval - round(interval)) > 1e-9 * interval:
            raise SegyFormatError(
                f"{path}: extended sample interval {interval!r} (binary header bytes 3273-3280, "
                "SEG-Y rev 2.0) is not a positive whole number of microseconds; resample the file"
            )
        interval_us = int(round(interval))
    return max(samples, 0), interval_us, binary_field(binary, "n_traces", order, signed=False)


def _check_trace_headers(
    path: str, traces: np.ndarray, order: str, field: tuple[int, int], expected: int, what: str, where: str
) -> None:
    """Every trace's value of ``field`` is 0 (not set) or ``expected``; vectorised over all traces."""
    byte, width = field
    if expected >= 1 << (8 * width):
        logger.debug("%s: %s %d does not fit the %d-byte trace field; not checked", path, what, expected, width)
        return
    for t0 in range(0, traces.shape[0], _CHECK_TRACES):
        values = header_column(traces[t0 : t0 + _CHECK_TRACES], byte, width, order, signed=False)
        bad = (values != 0) & (values != expected)
        if bad.any():
            i = int(np.argmax(bad))
            raise SegyFormatError(
                f"{path}: trace {t0 + i} says {int(values[i])} for the {what} (trace header bytes "
                f"{byte}-{byte + width - 1}) but the binary header says {expected} ({where}); "
                "traces of different length or sampling are not supported: split or resample the file"
            )


def scan_segy(path: str | os.PathLike, header_layout: Mapping[str, tuple[int, int]]) -> SegyInfo:
    """Open, check and describe a SEG-Y file without reading its samples.

    Parameters
    ----------
    path : the SEG-Y file.
    header_layout : ``{field: (1-based byte, width)}``; ``n_samples`` and
        ``interval_us`` (default 115 and 117, SEG-Y rev 1 trace header) are
        the trace-header fields checked against the binary header.

    The byte order comes from the rev 2.0 constant 0x01020304 at bytes
    3297-3300 when present, else from the order that gives a valid format
    code (a valid code read in the wrong order is a multiple of 256, so at
    most one order qualifies); the sample count is then confirmed by the
    file size, which must be whole traces. Rev 2.0 fields (extended samples, extended interval, additional
    trace headers, first-trace offset, trailers, trace count) are read when
    the revision byte 3501 is 2 or more; otherwise those bytes are
    unassigned (rev 1) and ignored. A binary-header sample count or
    interval of 0 is taken from the first trace header.

    Raises
    ------
    InputNotFoundError
        The file does not exist.
    SegyFormatError
        Not SEG-Y; unsupported format code or layout; no traces; a partial
        trace at the end; a trace header disagreeing with the binary header
        on samples per trace or sample interval (0 in a trace means "not set").
    """
    path = os.fspath(path)
    if not os.path.exists(path):
        raise InputNotFoundError(f"{path}: no such SEG-Y file; check the path")
    if not os.path.isfile(path):
        raise _not_segy(path, "it is not a regular file")
    size = os.path.getsize(path)
    if size < FILE_HEADER_BYTES:
        raise _not_segy(
            path, f"{size} bytes, fewer than the {FILE_HEADER_BYTES} of the textual and binary file headers"
        )
    with open(path, "rb") as f:
        head = f.read(FILE_HEADER_BYTES)
        textual, binary = head[:TEXTUAL_BYTES], head[TEXTUAL_BYTES:]
        order = _detect_byte_order(path, binary)
        code = binary_field(binary, "format_code", order)
        if code not in SUPPORTED_FORMATS:
            supported = ", ".join(f"{c} ({FORMAT_NAMES[c]})" for c in SUPPORTED_FORMATS)
            raise SegyFormatError(
                f"{path}: data sample format code {code} ({FORMAT_NAMES.get(code, 'unknown')}, binary "
                f"header bytes 3225-3226) is not supported; supported codes: {supported}"
            )
        n_ext = binary_field(binary, "n_extended_textual", order)
        if n_ext == -1:
            raise SegyFormatError(
                f"{path}: a variable number of extended textual headers (-1 at binary header bytes "
                "3505-3506) is not supported; rewrite the file with a counted number of them"
            )
        data_offset = FILE_HEADER_BYTES + TEXTUAL_BYTES * n_ext
        if n_ext < 0 or data_offset > size:
            raise _not_segy(path, f"{n_ext} extended textual headers (bytes 3505-3506) do not fit its {size} bytes")
        f.seek(FILE_HEADER_BYTES)
        extended = f.read(data_offset - FILE_HEADER_BYTES)
        first_header = f.read(TRACE_HEADER_BYTES)
    revision = (binary[300], binary[301])
    ext_samples = ext_interval = declared_traces = 0
    if revision[0] >= 2:
        ext_samples, ext_interval, declared_traces = _rev2_fields(path, binary, order, n_ext)
    count_field = _field_or_default(header_layout, "n_samples", _DEFAULT_COUNT)
    interval_field = _field_or_default(header_layout, "interval_us", _DEFAULT_INTERVAL)
    first = np.frombuffer(first_header.ljust(TRACE_HEADER_BYTES, b"\0"), dtype=np.uint8).reshape(1, -1)
    n_samples = ext_samples or binary_field(binary, "n_samples", order, signed=False)
    samples_where = "bytes 3269-3272" if ext_samples else "bytes 3221-3222"
    if n_samples == 0:
        n_samples = int(header_column(first, *count_field, order, signed=False)[0])
        samples_where = "first trace header"
    interval_us = ext_interval or binary_field(binary, "sample_interval_us", order, signed=False)
    interval_where = "bytes 3273-3280" if ext_interval else "bytes 3217-3218"
    if interval_us == 0:
        interval_us = int(header_column(first, *interval_field, order, signed=False)[0])
        interval_where = "first trace header"
    if size == data_offset:
        raise SegyFormatError(f"{path} holds no traces: it ends after its {data_offset} header bytes")
    if n_samples == 0 or interval_us == 0:
        raise SegyFormatError(
            f"{path}: samples per trace ({n_samples}) or sample interval ({interval_us} us) is not set, "
            "neither in the binary header (bytes 3221-3222, 3217-3218) nor in the first trace header"
        )
    sample_bytes = SUPPORTED_FORMATS[code][1]
    trace_bytes = TRACE_HEADER_BYTES + n_samples * sample_bytes
    n_traces, partial = divmod(size - data_offset, trace_bytes)
    if partial:
        raise SegyFormatError(
            f"{path} is truncated or its traces are not {trace_bytes} bytes long (240 + {n_samples} "
            f"samples x {sample_bytes} bytes): {n_traces} whole traces, then {partial} bytes of a "
            f"partial trace starting at byte offset {data_offset + n_traces * trace_bytes}"
        )
    if declared_traces and declared_traces != n_traces:
        raise SegyFormatError(
            f"{path}: the binary header declares {declared_traces} traces (bytes 3513-3520, SEG-Y "
            f"rev 2.0) but the file holds {n_traces} whole traces of {trace_bytes} bytes; it may be truncated"
        )
    traces = np.memmap(path, dtype=np.uint8, mode="r", offset=data_offset, shape=(n_traces, trace_bytes))
    try:
        _check_trace_headers(path, traces, order, count_field, n_samples, "samples per trace", samples_where)
        _check_trace_headers(path, traces, order, interval_field, interval_us, "sample interval in us", interval_where)
    finally:
        del traces
    system = binary_field(binary, "measurement_system", order)
    info = SegyInfo(
        path=path,
        size=size,
        byte_order=order,
        format_code=code,
        sample_bytes=sample_bytes,
        n_samples=n_samples,
        sample_interval_us=interval_us,
        n_traces=n_traces,
        data_offset=data_offset,
        trace_bytes=trace_bytes,
        textual=textual,
        extended_textual=extended,
        binary=binary,
        revision=revision,
        measurement_system=system if system in (1, 2) else 0,
        textual_encoding=_textual_encoding(textual),
    )
    logger.info(
        "%s: %d traces x %d samples at %d us, format %d, %s-endian, rev %d.%d",
        path, n_traces, n_samples, interval_us, code, order, *revision,
    )
    return info


def _open_traces(info: SegyInfo, start: int, stop: int) -> np.ndarray:
    """Raw bytes of traces ``start:stop`` as a read-only uint8 memmap [n * trace_bytes]."""
    if not (isinstance(start, (int, np.integer)) and isinstance(stop, (int, np.integer))):
        raise TypeError(f"trace range must be integers, got {start!r}:{stop!r}")
    if not 0 <= start <= stop <= info.n_traces:
        raise IndexError(f"{info.path}: traces {start}:{stop} outside 0:{info.n_traces}")
    try:
        size = os.path.getsize(info.path)
    except FileNotFoundError:
        raise InputNotFoundError(f"{info.path}: the SEG-Y file was removed after it was scanned") from None
    if size != info.size:
        raise SegyFormatError(f"{info.path} changed since it was scanned: {size} bytes, was {info.size}; scan it again")
    n = int(stop - start)
    if n == 0:
        return np.empty(0, dtype=np.uint8)
    return np.memmap(info.path, dtype=np.uint8, mode="r", offset=info.data_offset + int(start) * info.trace_bytes,
                     shape=(n * info.trace_bytes,))


def _trace_records(raw: np.ndarray, info: SegyInfo) -> np.ndarray:
    dtype = np.dtype([("header", np.uint8, (TRACE_HEADER_BYTES,)), ("samples", info.sample_dtype, (info.n_samples,))])
    return raw.view(dtype)


def _digest(data: np.ndarray) -> bytes:
    """Big-endian CRC-32 and byte count of a buffer.

    A CRC, not a cryptographic hash: the fingerprint detects accidental
    change (a different or re-written file), not tampering. zlib-ng's CRC-32
    gives the values of zlib's, at 26 GB/s here against zlib's 4.7 GB/s on
    a 24 MB block (measured, one core); on a second thread, zlib's had
    still cost a two-worker ingest about 9 ms of each 24 MB chunk's 44 ms.
    """
    return struct.pack(">IQ", crc32(data), data.size)


def read_block(
    info: SegyInfo, start: int, stop: int, *, digest: bool = True
) -> tuple[np.ndarray, np.ndarray, bytes | None]:
    """Read traces ``start:stop`` (0-based, stop excluded).

    Returns
    -------
    samples : float32 [n, n_samples]. IEEE (5) as stored, byte-swapped to
        native; integers (2, 3, 8) converted to float32 (exact up to 2**24
        in magnitude); IBM (1) by the exact decoder of ``storage.ibm``,
        which also decodes unnormalised fractions correctly.
    headers : uint8 [n, 240], the raw trace headers as in the file.
    digest : 12 bytes, big-endian CRC-32 and byte count of the raw bytes of
        the block (headers and samples), so a caller fingerprints
        the file in the same pass; ``None`` when ``digest=False``.

    Raises
    ------
    SampleRangeError
        An IBM sample beyond the float32 range, naming the file and trace.
    SegyFormatError
        The file changed size since it was scanned.
    IndexError
        ``start:stop`` outside ``0:info.n_traces``.
    """
    raw = _open_traces(info, start, stop)
    samples, headers = _decode_records(info, raw, start, stop)
    return samples, headers, _digest(raw) if digest else None


def read_trace_headers(info: SegyInfo, start: int = 0, stop: int | None = None) -> np.ndarray:
    """The raw 240-byte trace headers of traces ``start:stop`` (default: all),
    uint8 [n, 240] as in the file, without decoding the samples; raises as
    :func:`read_block`."""
    raw = _open_traces(info, start, info.n_traces if stop is None else stop)
    return _raw_headers(_trace_records(raw, info))


def _raw_headers(records: np.ndarray) -> np.ndarray:
    """The headers of trace records, copied: uint8 [n, 240]."""
    return np.array(records["header"]) if len(records) else np.empty((0, TRACE_HEADER_BYTES), np.uint8)


def _decode_records(info: SegyInfo, raw: np.ndarray, start: int, stop: int) -> tuple[np.ndarray, np.ndarray]:
    n = raw.size // info.trace_bytes
    records = _trace_records(raw, info)
    headers = _raw_headers(records)
    samples = np.empty((n, info.n_samples), dtype=np.float32)
    if n and info.format_code == 1:
        try:
            ibm_to_float32(records["samples"], out=samples)
        except SampleRangeError as err:
            values = ibm_to_float64(records["samples"])
            bad = np.argwhere(np.abs(values) > np.finfo(np.float32).max)
            trace, sample = (int(i) for i in bad[0])
            raise SampleRangeError(
                f"{info.path}: trace {start + trace}, sample {sample} is {values[trace, sample]:.7e} in IBM "
                f"floating point, beyond the float32 range ({len(bad)} such samples in traces "
                f"{start}:{stop}); check the format code (bytes 3225-3226) or rescale the file"
            ) from err
    elif n:
        samples[...] = records["samples"]
    return samples, headers


class ScaledCoordinates(dict):
    """``{name: float64 [n]}`` of coordinates, elevations and offset.

    ``unit`` is the unit of the values: ``"m"`` when the binary header
    states metres or feet (feet are converted), ``"unknown"`` when it does
    not say (values are left in the file's unit). ``source_unit`` is the
    file's unit: ``"m"``, ``"ft"`` or ``"unknown"``.
    """

    unit: str
    source_unit: str


def _apply_scalar(values: np.ndarray, scalar: np.ndarray) -> np.ndarray:
    # SEG-Y rev 1, trace header bytes 69-72: positive multiplies, negative divides, 0 means 1.
    scalar = scalar.astype(np.float64)
    times = np.where(scalar > 0, scalar, 1.0)
    over = np.where(scalar < 0, -scalar, 1.0)
    return values.astype(np.float64) * times / over


def scale_coordinates(fields: Mapping[str, np.ndarray], measurement_system: int) -> ScaledCoordinates:
    """Apply the SEG-Y scalars and convert feet to metres.

    Parameters
    ----------
    fields : int arrays [n] as from ``decode_fields``: ``source_x``,
        ``source_y``, ``receiver_x``, ``receiver_y`` (scaled by
        ``coordinate_scalar``, bytes 71-72), ``source_elevation``,
        ``receiver_elevation`` (scaled by ``elevation_scalar``, bytes
        69-70), ``offset`` (no scalar); optional ``coordinate_units``
        (bytes 89-90).
    measurement_system : binary header bytes 3255-3256: 1 metres, 2 feet
        (multiplied by 0.3048 exactly), anything else unknown (unconverted).

    Returns
    -------
    ``ScaledCoordinates``: ``{source_x, source_y, receiver_x, receiver_y,
    source_elevation, receiver_elevation, offset: float64 [n]}``, with the
    attributes ``unit`` and ``source_unit`` (see the class).

    Raises
    ------
    SegyFormatError
        When ``coordinate_units`` is 2 (arc seconds), 3 (decimal degrees)
        or 4 (degrees, minutes, seconds), naming the first such trace of
        ``fields`` (counting from 0).
    KeyError
        A required field is missing.
    """
    units = fields.get("coordinate_units")
    if units is not None:
        geographic = np.isin(np.asarray(units), (2, 3, 4))
        if geographic.any():
            i = int(np.argmax(geographic))
            raise SegyFormatError(
                f"trace {i}: coordinate units {int(units[i])} (trace header bytes 89-90: 2 arc seconds, "
                "3 decimal degrees, 4 DMS): geographic coordinates are not supported; project them first"
            )
    factor = _FEET if measurement_system == 2 else 1.0
    coordinate = np.asarray(fields["coordinate_scalar"])
    elevation = np.asarray(fields["elevation_scalar"])
    out = ScaledCoordinates()
    for name in ("source_x", "source_y", "receiver_x", "receiver_y"):
        out[name] = _apply_scalar(np.asarray(fields[name]), coordinate) * factor
    for name in ("source_elevation", "receiver_elevation"):
        out[name] = _apply_scalar(np.asarray(fields[name]), elevation) * factor
    out["offset"] = np.asarray(fields["offset"]).astype(np.float64) * factor
    out.unit = "m" if measurement_system in (1, 2) else "unknown"
    out.source_unit = {1: "m", 2: "ft"}.get(measurement_system, "unknown")
    return out


def quick_fingerprint(info: SegyInfo) -> str:
    """Cheap identity of a SEG-Y file: is this the same file as before?

    Hex blake2b (16 bytes) over the file size, the textual, extended textual
    and binary headers, every 240-byte trace header (read through a strided
    memmap, a few bytes per trace) and the samples of the first and last
    traces. Limitation: a change confined to the samples of middle traces,
    with identical headers, is not seen; the per-block digests of
    ``read_block`` cover every byte.
    """
    h = hashlib.blake2b(digest_size=16)
    h.update(info.size.to_bytes(8, "little"))
    h.update(info.textual)
    h.update(info.extended_textual)
    h.update(info.binary)
    traces = np.memmap(info.path, dtype=np.uint8, mode="r", offset=info.data_offset,
                       shape=(info.n_traces, info.trace_bytes))
    try:
        for t0 in range(0, info.n_traces, _CHECK_TRACES):
            h.update(np.ascontiguousarray(traces[t0 : t0 + _CHECK_TRACES, :TRACE_HEADER_BYTES]))
        h.update(np.ascontiguousarray(traces[0, TRACE_HEADER_BYTES:]))
        h.update(np.ascontiguousarray(traces[-1, TRACE_HEADER_BYTES:]))
    finally:
        del traces
    return h.hexdigest()
