"""SEG-Y header tables and trace-header field decoding.

Byte positions are 1-based, as the standards print them:

* trace header: SEG-Y rev 1 (2002), table 2 (240 bytes per trace);
* binary file header: SEG-Y rev 2.0 (2017), table 2 (file bytes 3201-3600),
  which keeps every rev 1 (2002) table 1 position and fills some of rev 1's
  unassigned bytes (3261-3300, 3507-3532).

The tables drive byte swapping (each field reversed as one unit of its
width) and the named fields of the writer; ``decode_fields`` reads any
``{name: (byte, width)}`` layout, such as ``HeaderPositions.layout()``.
"""

from __future__ import annotations

import logging
from collections.abc import Mapping

import numpy as np

from descatter.tasks.errors import ConfigError

logger = logging.getLogger(__name__)

TEXTUAL_BYTES = 3200
BINARY_BYTES = 400
TRACE_HEADER_BYTES = 240
#: Bytes before the first extended textual header or trace: textual + binary.
FILE_HEADER_BYTES = TEXTUAL_BYTES + BINARY_BYTES

# fmt: off
#: (name, 1-based byte, width) of every field of SEG-Y rev 1 (2002) table 2.
#: Bytes 219-224 (source energy direction) are one 6-byte entry in rev 1;
#: like segyio we read them as a 4-byte mantissa and a 2-byte exponent, the
#: layout of the neighbouring transduction constant and source measurement.
#: Bytes 233-240 are unassigned in rev 1 and are never swapped.
TRACE_HEADER_FIELDS: tuple[tuple[str, int, int], ...] = (
    ("trace_sequence_line", 1, 4), ("trace_sequence_file", 5, 4),
    ("field_record", 9, 4), ("channel", 13, 4), ("energy_source_point", 17, 4),
    ("ensemble", 21, 4), ("ensemble_trace", 25, 4),
    ("trace_id_code", 29, 2), ("vertically_summed", 31, 2),
    ("horizontally_stacked", 33, 2), ("data_use", 35, 2),
    ("offset", 37, 4), ("receiver_elevation", 41, 4), ("source_elevation", 45, 4),
    ("source_depth", 49, 4), ("receiver_datum_elevation", 53, 4),
    ("source_datum_elevation", 57, 4), ("source_water_depth", 61, 4),
    ("receiver_water_depth", 65, 4),
    ("elevation_scalar", 69, 2), ("coordinate_scalar", 71, 2),
    ("source_x", 73, 4), ("source_y", 77, 4), ("receiver_x", 81, 4), ("receiver_y", 85, 4),
    ("coordinate_units", 89, 2), ("weathering_velocity", 91, 2),
    ("subweathering_velocity", 93, 2), ("source_uphole_time", 95, 2),
    ("receiver_uphole_time", 97, 2), ("source_static", 99, 2),
    ("receiver_static", 101, 2), ("total_static", 103, 2),
    ("lag_time_a", 105, 2), ("lag_time_b", 107, 2), ("delay_ms", 109, 2),
    ("mute_start", 111, 2), ("mute_end", 113, 2),
    ("n_samples", 115, 2), ("interval_us", 117, 2),
    ("gain_type", 119, 2), ("instrument_gain", 121, 2), ("instrument_initial_gain", 123, 2),
    ("correlated", 125, 2), ("sweep_start_hz", 127, 2), ("sweep_end_hz", 129, 2),
    ("sweep_length_ms", 131, 2), ("sweep_type", 133, 2),
    ("sweep_taper_start_ms", 135, 2), ("sweep_taper_end_ms", 137, 2), ("taper_type", 139, 2),
    ("alias_filter_hz", 141, 2), ("alias_filter_slope", 143, 2),
    ("notch_filter_hz", 145, 2), ("notch_filter_slope", 147, 2),
    ("low_cut_hz", 149, 2), ("high_cut_hz", 151, 2),
    ("low_cut_slope", 153, 2), ("high_cut_slope", 155, 2),
    ("year", 157, 2), ("day_of_year", 159, 2), ("hour", 161, 2), ("minute", 163, 2),
    ("second", 165, 2), ("time_basis", 167, 2), ("trace_weighting", 169, 2),
    ("roll_switch_group", 171, 2), ("first_trace_group", 173, 2),
    ("last_trace_group", 175, 2), ("gap_size", 177, 2), ("overtravel", 179, 2),
    ("cmp_x", 181, 4), ("cmp_y", 185, 4), ("inline", 189, 4), ("crossline", 193, 4),
    ("shotpoint", 197, 4), ("shotpoint_scalar", 201, 2), ("trace_value_unit", 203, 2),
    ("transduction_mantissa", 205, 4), ("transduction_exponent", 209, 2),
    ("transduction_unit", 211, 2), ("device_id", 213, 2), ("time_scalar", 215, 2),
    ("source_type", 217, 2),
    ("source_energy_direction_mantissa", 219, 4), ("source_energy_direction_exponent", 223, 2),
    ("source_measurement_mantissa", 225, 4), ("source_measurement_exponent", 229, 2),
    ("source_measurement_unit", 231, 2),
)

#: (name, 1-based file byte, width) of SEG-Y rev 2.0 (2017) binary header table 2.
#: The 8-byte fields are IEEE doubles (3273, 3281) or unsigned integers (3513,
#: 3521); 3501 and 3502 are the single-byte major and minor revision numbers,
#: so byte order does not apply to them.
BINARY_HEADER_FIELDS: tuple[tuple[str, int, int], ...] = (
    ("job_id", 3201, 4), ("line_number", 3205, 4), ("reel_number", 3209, 4),
    ("traces_per_ensemble", 3213, 2), ("aux_traces_per_ensemble", 3215, 2),
    ("sample_interval_us", 3217, 2), ("original_interval_us", 3219, 2),
    ("n_samples", 3221, 2), ("original_n_samples", 3223, 2),
    ("format_code", 3225, 2), ("ensemble_fold", 3227, 2), ("sorting_code", 3229, 2),
    ("vertical_sum", 3231, 2), ("sweep_start_hz", 3233, 2), ("sweep_end_hz", 3235, 2),
    ("sweep_length_ms", 3237, 2), ("sweep_type", 3239, 2), ("sweep_channel", 3241, 2),
    ("sweep_taper_start_ms", 3243, 2), ("sweep_taper_end_ms", 3245, 2),
    ("taper_type", 3247, 2), ("correlated", 3249, 2), ("gain_recovered", 3251, 2),
    ("amplitude_recovery", 3253, 2), ("measurement_system", 3255, 2),
    ("impulse_polarity", 3257, 2), ("vibratory_polarity", 3259, 2),
    ("ext_traces_per_ensemble", 3261, 4), ("ext_aux_traces_per_ensemble", 3265, 4),
    ("ext_n_samples", 3269, 4), ("ext_sample_interval", 3273, 8),
    ("ext_original_interval", 3281, 8), ("ext_original_n_samples", 3289, 4),
    ("ext_ensemble_fold", 3293, 4), ("byte_order_word", 3297, 4),
    ("revision_major", 3501, 1), ("revision_minor", 3502, 1),
    ("fixed_length", 3503, 2), ("n_extended_textual", 3505, 2),
    ("max_extra_trace_headers", 3507, 4), ("time_basis", 3511, 2),
    ("n_traces", 3513, 8), ("first_trace_offset", 3521, 8), ("n_trailer_stanzas", 3529, 4),
)
# fmt: on

#: The rev 2.0 byte-order constant at bytes 3297-3300, as it reads in the file's byte order.
BYTE_ORDER_WORD = 0x01020304

_BINARY = {name: (byte, width) for name, byte, width in BINARY_HEADER_FIELDS}


def swap_permutation(fields: tuple[tuple[str, int, int], ...], first_byte: int, size: int) -> np.ndarray:
    """Index array ``p`` (intp, [size]) with ``swapped = raw[..., p]``.

    Each field of ``fields`` (1-based positions counted from ``first_byte``)
    is reversed as one unit; bytes outside every field keep their place.
    """
    perm = np.arange(size)
    for _, byte, width in fields:
        start = byte - first_byte
        perm[start : start + width] = perm[start : start + width][::-1]
    return perm


TRACE_SWAP = swap_permutation(TRACE_HEADER_FIELDS, 1, TRACE_HEADER_BYTES)
BINARY_SWAP = swap_permutation(BINARY_HEADER_FIELDS, 3201, BINARY_BYTES)


def binary_field(raw: bytes, name: str, byte_order: str, *, signed: bool = True) -> int:
    """One integer field of a 400-byte binary header, by its rev 2.0 table name."""
    byte, width = _BINARY[name]
    chunk = raw[byte - 3201 : byte - 3201 + width]
    return int.from_bytes(chunk, byte_order, signed=signed)


def binary_double(raw: bytes, name: str, byte_order: str) -> float:
    """One IEEE double field of a 400-byte binary header (rev 2.0: 3273, 3281)."""
    byte, width = _BINARY[name]
    dtype = np.dtype(">f8" if byte_order == "big" else "<f8")
    return float(np.frombuffer(raw, dtype=dtype, count=1, offset=byte - 3201)[0])


def put_binary_field(raw: bytearray, name: str, value: int, byte_order: str) -> None:
    """Write one integer field of a 400-byte binary header in place."""
    byte, width = _BINARY[name]
    signed = name not in ("n_traces", "first_trace_offset", "revision_major", "revision_minor")
    raw[byte - 3201 : byte - 3201 + width] = int(value).to_bytes(width, byte_order, signed=signed)


def _int_dtype(width: int, byte_order: str, *, signed: bool = True) -> np.dtype:
    code = {1: "1", 2: "2", 4: "4"}.get(width)
    if code is None:
        raise ConfigError(f"trace-header field width {width}: expected 1, 2 or 4 bytes")
    return np.dtype((">" if byte_order == "big" else "<") + ("i" if signed else "u") + code)


def check_layout(layout: Mapping[str, tuple[int, int]]) -> None:
    """Raise ConfigError unless every ``(byte, width)`` lies inside 240 bytes."""
    for name, (byte, width) in layout.items():
        _int_dtype(width, "big")
        if not 1 <= byte <= TRACE_HEADER_BYTES + 1 - width:
            raise ConfigError(
                f"trace-header field {name!r} at byte {byte} with width {width}: a field must "
                f"start between byte 1 and {TRACE_HEADER_BYTES + 1 - width} of the 240-byte header"
            )


def header_column(headers: np.ndarray, byte: int, width: int, byte_order: str, *, signed: bool = True) -> np.ndarray:
    """One field of every trace header, as integers of the field's own width.

    ``headers`` is uint8 [n, >=240] (rows may be whole traces of a memmap);
    the result is int8/16/32 (or unsigned) [n] in native byte order.
    """
    column = np.ascontiguousarray(headers[:, byte - 1 : byte - 1 + width])
    return column.view(_int_dtype(width, byte_order, signed=signed)).reshape(-1)


def decode_fields(
    headers: np.ndarray, layout: Mapping[str, tuple[int, int]], byte_order: str
) -> dict[str, np.ndarray]:
    """Decode named trace-header fields.

    Parameters
    ----------
    headers : uint8 [n, 240], raw trace headers as in the file.
    layout : ``{field: (1-based byte, width)}``, width 1, 2 or 4.
    byte_order : ``"big"`` or ``"little"``, the file's byte order.

    Returns
    -------
    ``{field: int32 [n]}``: each field read as a two's complement signed
    integer of its width (SEG-Y rev 1 (2002), section 2: "all values in the
    binary file header and the trace header are two's complement integers").

    Raises
    ------
    ConfigError
        For a width other than 1, 2 or 4, or a field outside the 240 bytes.
    """
    headers = np.asarray(headers)
    if headers.ndim != 2 or headers.shape[1] < TRACE_HEADER_BYTES or headers.dtype != np.uint8:
        raise ValueError(f"headers must be uint8 [n, 240], got {headers.dtype} {headers.shape}")
    check_layout(layout)
    return {
        name: header_column(headers, byte, width, byte_order).astype(np.int32)
        for name, (byte, width) in layout.items()
    }
