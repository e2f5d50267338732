"""Writing SEG-Y files: headers built or copied, traces appended in blocks.

``SegyWriter`` writes ``<path>.partial`` and renames it to ``path`` only on
a successful close, so a reader never sees a half-written file. The
builders make standard headers from numbers; the swap functions convert
headers between byte orders field by field.

Standards: SEG-Y rev 1 (2002) and SEG-Y rev 2.0 (2017). Byte positions
are 1-based as printed there.
"""

from __future__ import annotations

import logging
import os
from collections.abc import Mapping, Sequence

import numpy as np

from descatter.storage.ibm import float32_to_ibm
from descatter.storage.segy_headers import (
    BINARY_BYTES,
    BINARY_SWAP,
    BYTE_ORDER_WORD,
    FILE_HEADER_BYTES,
    TEXTUAL_BYTES,
    TRACE_HEADER_BYTES,
    TRACE_SWAP,
    binary_field,
    check_layout,
    header_column,
    put_binary_field,
)
from descatter.tasks.errors import ConfigError, SampleRangeError, SegyFormatError

__all__ = [
    "SAMPLE_FORMATS",
    "SegyWriter",
    "build_binary_header",
    "build_textual_header",
    "build_trace_headers",
    "swap_binary_header",
    "swap_trace_headers",
]

logger = logging.getLogger(__name__)

#: sample_format -> (SEG-Y format code, numpy kind and size).
SAMPLE_FORMATS: dict[str, tuple[int, str]] = {
    "ibm": (1, "u4"),
    "int32": (2, "i4"),
    "int16": (3, "i2"),
    "ieee": (5, "f4"),
    "int8": (8, "i1"),
}
_CODES = {code: name for name, (code, _) in SAMPLE_FORMATS.items()}
_INT16_MAX = 32767


def _order_char(byte_order: str) -> str:
    if byte_order not in ("big", "little"):
        raise ValueError(f"byte_order must be 'big' or 'little', got {byte_order!r}")
    return ">" if byte_order == "big" else "<"


def swap_trace_headers(headers: np.ndarray) -> np.ndarray:
    """Byte-swap every field of SEG-Y trace headers.

    ``headers`` uint8 [n, 240] -> new uint8 [n, 240]: each field of the
    SEG-Y rev 1 (2002) trace header table (widths 2 and 4, see
    ``segy_headers.TRACE_HEADER_FIELDS``) reversed; unassigned bytes
    233-240 are left as they are. Swapping twice is the identity.
    """
    headers = np.asarray(headers)
    if headers.ndim != 2 or headers.shape[1] != TRACE_HEADER_BYTES or headers.dtype != np.uint8:
        raise ValueError(f"headers must be uint8 [n, 240], got {headers.dtype} {headers.shape}")
    return headers[:, TRACE_SWAP]


def swap_binary_header(raw: bytes) -> bytes:
    """Byte-swap every field of a 400-byte binary file header.

    Fields of the SEG-Y rev 2.0 (2017) table (a superset of rev 1's): 2-
    and 4-byte integers, the 8-byte doubles and integers reversed as 8-byte
    units, the single-byte revision numbers (3501, 3502) and unassigned
    bytes unchanged. The rev 2.0 byte-order constant (3297-3300) is swapped
    with the rest, so it stays true. Swapping twice is the identity.
    """
    if len(raw) != BINARY_BYTES:
        raise ValueError(f"a binary header has {BINARY_BYTES} bytes, got {len(raw)}")
    return np.frombuffer(raw, dtype=np.uint8)[BINARY_SWAP].tobytes()


def build_textual_header(lines: Sequence[str]) -> bytes:
    """A 3200-byte EBCDIC textual header of 40 cards of 80 columns.

    Card ``i`` (1-40) is ``f"C{i:2d} "`` followed by ``lines[i-1]`` (at most
    76 characters), blank-padded, as SEG-Y rev 1 (2002) section 3.1 lays it
    out, encoded in EBCDIC code page 037; characters outside it become '?'.
    Missing lines are blank cards.
    """
    if len(lines) > 40:
        raise ValueError(f"a textual header holds 40 cards, got {len(lines)} lines")
    cards = []
    for i in range(1, 41):
        text = lines[i - 1] if i <= len(lines) else ""
        if len(text) > 76 or "\n" in text:
            raise ValueError(f"textual header line {i} must be one line of at most 76 characters, got {text!r}")
        cards.append(f"C{i:2d} {text}".ljust(80))
    return "".join(cards).encode("cp037", errors="replace")


def build_binary_header(
    *,
    sample_interval_us: int,
    n_samples: int,
    format_code: int,
    measurement_system: int = 1,
    revision: tuple[int, int] = (1, 0),
    fixed_length: int = 1,
    n_extended_textual: int = 0,
) -> bytes:
    """A 400-byte big-endian binary file header.

    Sets bytes 3217-3218 (sample interval, us), 3221-3222 (samples per
    trace), 3225-3226 (format code), 3255-3256 (measurement system),
    3501-3502 (revision, one byte each: (1, 0) is rev 1's 0x0100),
    3503-3504 (fixed length flag) and 3505-3506 (extended textual headers);
    everything else 0. For revision 2 or later also the byte-order constant
    0x01020304 at 3297-3300, and the extended sample count (3269-3272) or
    interval (3273-3280, IEEE double) when a value exceeds 32767.
    """
    if format_code not in _CODES:
        raise SegyFormatError(f"format code {format_code} is not written; supported: {sorted(_CODES)}")
    rev2 = revision[0] >= 2
    for name, value in (("n_samples", n_samples), ("sample_interval_us", sample_interval_us)):
        if value < 1 or (value > _INT16_MAX and not rev2) or value >= 1 << 31:
            raise ValueError(
                f"{name} = {value}: expected 1 to {_INT16_MAX} (2-byte field of SEG-Y rev 1), "
                "or up to 2**31 - 1 with revision=(2, 0)"
            )
    raw = bytearray(BINARY_BYTES)
    put_binary_field(raw, "format_code", format_code, "big")
    put_binary_field(raw, "measurement_system", measurement_system, "big")
    put_binary_field(raw, "revision_major", revision[0], "big")
    put_binary_field(raw, "revision_minor", revision[1], "big")
    put_binary_field(raw, "fixed_length", fixed_length, "big")
    put_binary_field(raw, "n_extended_textual", n_extended_textual, "big")
    if n_samples <= _INT16_MAX:
        put_binary_field(raw, "n_samples", n_samples, "big")
    else:
        put_binary_field(raw, "ext_n_samples", n_samples, "big")
    if sample_interval_us <= _INT16_MAX:
        put_binary_field(raw, "sample_interval_us", sample_interval_us, "big")
    else:
        raw[72:80] = np.array([sample_interval_us], dtype=">f8").tobytes()
    if rev2:
        put_binary_field(raw, "byte_order_word", BYTE_ORDER_WORD, "big")
    return bytes(raw)


def build_trace_headers(
    fields: Mapping[str, np.ndarray | int], layout: Mapping[str, tuple[int, int]], n: int
) -> np.ndarray:
    """Big-endian trace headers from named fields.

    Parameters
    ----------
    fields : ``{name: int array [n] or scalar}``; every name must be in
        ``layout`` (coordinates, and also scalars and units such as
        ``coordinate_scalar``, ``elevation_scalar``, ``coordinate_units``).
    layout : ``{field: (1-based byte, width)}``, width 1, 2 or 4.
    n : number of traces.

    Returns
    -------
    uint8 [n, 240]: each field as a big-endian two's complement integer of
    its width (SEG-Y rev 1 (2002), section 2), all other bytes 0. The
    inverse of ``decode_fields(..., byte_order="big")``.

    Raises
    ------
    KeyError
        A name not in ``layout``.
    ConfigError
        Two given fields overlap, or a field lies outside the 240 bytes.
    SampleRangeError
        A value is not an integer or does not fit its field.
    """
    unknown = sorted(set(fields) - set(layout))
    if unknown:
        raise KeyError(f"unknown trace-header fields {unknown}; the layout has {sorted(layout)}")
    used = {name: layout[name] for name in fields}
    check_layout(used)
    spans = sorted((byte, byte + width, name) for name, (byte, width) in used.items())
    for (_, end, a), (start, _, b) in zip(spans, spans[1:]):
        if start < end:
            raise ConfigError(f"trace-header fields {a!r} and {b!r} overlap in the layout")
    out = np.zeros((n, TRACE_HEADER_BYTES), dtype=np.uint8)
    for name, value in fields.items():
        byte, width = used[name]
        values = np.broadcast_to(np.asarray(value), (n,))
        if values.dtype.kind not in "iubf":
            raise SampleRangeError(f"trace-header field {name!r}: expected integers, got dtype {values.dtype}")
        limit = 1 << (8 * width - 1)
        with np.errstate(invalid="ignore"):
            ok = (values >= -limit) & (values < limit)  # NaN fails
            if values.dtype.kind == "f":
                ok &= np.rint(values) == values
        if not ok.all():
            i = int(np.argmin(ok))
            raise SampleRangeError(
                f"trace-header field {name!r} (bytes {byte}-{byte + width - 1}): trace {i} has "
                f"{values[i].item()!r}, expected an integer from {-limit} to {limit - 1}"
            )
        column = values.astype(f">i{width}").view(np.uint8).reshape(n, width)
        out[:, byte - 1 : byte - 1 + width] = column
    return out


class SegyWriter:
    """Write a SEG-Y file atomically, in blocks of whole traces.

    ``SegyWriter(path, *, textual, binary, n_samples, sample_format,
    byte_order="big", extended_textual=b"")``: ``textual`` 3200 bytes,
    ``binary`` 400 bytes and ``extended_textual`` n x 3200 bytes, all
    already in ``byte_order`` (convert headers read in the other order with
    ``swap_binary_header`` / ``swap_trace_headers``). ``sample_format`` is
    ``"ieee"``, ``"ibm"``, ``"int32"``, ``"int16"`` or ``"int8"``.

    The binary header is copied as given except for: the format code
    (3225-3226), samples per trace (3221-3222, or 3269-3272 for rev 2 above
    32767), the count of extended textual headers (3505-3506) and, for rev
    2, the fields that would contradict this file (additional trace headers
    and trailer count set to 0, first-trace offset and trace count set to
    what is written). The file appears under ``path`` (``os.replace`` of
    ``<path>.partial``, after fsync) only when ``close`` succeeds; leaving a
    ``with`` block by an exception removes the partial file.
    """

    def __init__(
        self,
        path: str | os.PathLike,
        *,
        textual: bytes,
        binary: bytes,
        n_samples: int,
        sample_format: str,
        byte_order: str = "big",
        extended_textual: bytes = b"",
    ) -> None:
        order = _order_char(byte_order)
        if sample_format not in SAMPLE_FORMATS:
            raise ValueError(f"sample_format must be one of {sorted(SAMPLE_FORMATS)}, got {sample_format!r}")
        if len(textual) != TEXTUAL_BYTES or len(binary) != BINARY_BYTES or len(extended_textual) % TEXTUAL_BYTES:
            raise ValueError(
                f"expected a {TEXTUAL_BYTES}-byte textual header, a {BINARY_BYTES}-byte binary header and "
                f"n x {TEXTUAL_BYTES} extended bytes; got {len(textual)}, {len(binary)}, {len(extended_textual)}"
            )
        if n_samples < 1:
            raise ValueError(f"n_samples must be at least 1, got {n_samples}")
        self.path = os.fspath(path)
        self.partial_path = self.path + ".partial"
        self.byte_order = byte_order
        self.n_samples = int(n_samples)
        self.sample_format = sample_format
        code, kind = SAMPLE_FORMATS[sample_format]
        self._dtype = np.dtype([("header", np.uint8, (TRACE_HEADER_BYTES,)), ("samples", order + kind, (n_samples,))])
        self._binary = self._patched_binary(binary, code, len(extended_textual) // TEXTUAL_BYTES)
        self.n_traces = 0
        self._file = open(self.partial_path, "wb")
        try:
            self._file.write(textual)
            self._file.write(self._binary)
            self._file.write(extended_textual)
        except BaseException:
            self.abort()
            raise

    def _patched_binary(self, binary: bytes, code: int, n_ext: int) -> bytearray:
        raw = bytearray(binary)
        order = self.byte_order
        rev2 = raw[300] >= 2
        put_binary_field(raw, "format_code", code, order)
        put_binary_field(raw, "n_extended_textual", n_ext, order)
        if self.n_samples <= _INT16_MAX:
            put_binary_field(raw, "n_samples", self.n_samples, order)
            if rev2 and binary_field(raw, "ext_n_samples", order):
                put_binary_field(raw, "ext_n_samples", self.n_samples, order)
        elif rev2:
            put_binary_field(raw, "n_samples", 0, order)
            put_binary_field(raw, "ext_n_samples", self.n_samples, order)
        else:
            raise ValueError(f"n_samples = {self.n_samples} needs a SEG-Y rev 2 binary header (byte 3501 >= 2)")
        if rev2:
            put_binary_field(raw, "max_extra_trace_headers", 0, order)
            put_binary_field(raw, "n_trailer_stanzas", 0, order)
            if binary_field(raw, "first_trace_offset", order, signed=False):
                put_binary_field(raw, "first_trace_offset", FILE_HEADER_BYTES + TEXTUAL_BYTES * n_ext, order)
        return raw

    def __enter__(self) -> "SegyWriter":
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        if exc_type is None:
            self.close()
        else:
            self.abort()

    def _encode(self, samples: np.ndarray, records: np.ndarray) -> None:
        if self.sample_format == "ieee":
            records["samples"] = samples
            return
        if self.sample_format == "ibm":
            records["samples"] = float32_to_ibm(samples)
            return
        info = np.iinfo(self._dtype["samples"].base)
        rounded = np.rint(samples)
        wide = rounded.astype(np.float64)  # float32 cannot hold 2**31 - 1: compare exactly
        bad = ~((wide >= info.min) & (wide <= info.max))  # NaN fails both
        if bad.any():
            trace, sample = (int(i) for i in np.argwhere(bad)[0])
            raise SampleRangeError(
                f"{self.path}: {int(bad.sum())} sample(s) do not fit {self.sample_format} "
                f"({info.min} to {info.max}); the first, trace {self.n_traces + trace} sample {sample}, "
                f"is {float(samples[trace, sample])!r}; scale the data or write 'ieee'"
            )
        records["samples"] = rounded

    def write(self, headers: np.ndarray, samples: np.ndarray) -> None:
        """Append traces: ``headers`` uint8 [n, 240] (in the file's byte order)
        and ``samples`` float32 [n, n_samples], in one structured write.

        Raises SegyFormatError when a trace header's sample count (bytes
        115-116) is neither 0 nor ``n_samples``, and SampleRangeError when a
        sample does not fit the format (NaN/inf for IBM and the integers).
        """
        if self._file is None:
            raise ValueError(f"{self.path}: the writer is closed")
        headers = np.asarray(headers)
        samples = np.asarray(samples, dtype=np.float32)
        n = headers.shape[0] if headers.ndim == 2 else -1
        shapes_ok = headers.shape == (n, TRACE_HEADER_BYTES) and samples.shape == (n, self.n_samples)
        if headers.dtype != np.uint8 or not shapes_ok:
            raise ValueError(
                f"expected headers uint8 [n, 240] and samples [n, {self.n_samples}], got "
                f"{headers.dtype} {headers.shape} and {samples.shape}"
            )
        if self.n_samples <= 0xFFFF:
            counts = header_column(headers, 115, 2, self.byte_order, signed=False)
            bad = (counts != 0) & (counts != self.n_samples)
            if bad.any():
                i = int(np.argmax(bad))
                raise SegyFormatError(
                    f"{self.path}: trace {self.n_traces + i} header says {int(counts[i])} samples "
                    f"(bytes 115-116) but the file has {self.n_samples} per trace; fix the header"
                )
        records = np.empty(n, dtype=self._dtype)
        records["header"] = headers
        self._encode(samples, records)
        self._file.write(records.data)
        self.n_traces += n

    def close(self) -> None:
        """Finish the file: fix the rev 2 trace count, fsync, rename into place."""
        if self._file is None:
            return
        try:
            if self.n_traces == 0:
                raise SegyFormatError(f"{self.path}: no traces were written; a SEG-Y file needs at least one")
            if self._binary[300] >= 2 and binary_field(self._binary, "n_traces", self.byte_order, signed=False):
                put_binary_field(self._binary, "n_traces", self.n_traces, self.byte_order)
                self._file.seek(TEXTUAL_BYTES)
                self._file.write(self._binary)
            self._file.flush()
            os.fsync(self._file.fileno())
            self._file.close()
            self._file = None
            os.replace(self.partial_path, self.path)
        except BaseException:
            self.abort()
            raise
        logger.info(
            "%s: wrote %d traces x %d samples (%s)", self.path, self.n_traces, self.n_samples, self.sample_format
        )

    def abort(self) -> None:
        """Stop writing and remove the partial file; ``path`` is not touched."""
        if self._file is not None:
            self._file.close()
            self._file = None
        try:
            os.remove(self.partial_path)
        except FileNotFoundError:
            pass
