"""Reading SEG-Y: scan checks, blocks of traces, header fields.

Files come from ``conftest``: packed by hand with ``struct`` at the byte
positions of SEG-Y rev 1 (2002) and rev 2.0 (2017), or written by segyio
(an independent implementation).
"""

from __future__ import annotations

import shutil
import struct
import zlib

import numpy as np
import pytest
import segyio
from hypothesis import given, settings
from hypothesis import strategies as st

from descatter.storage.segy import (
    decode_fields,
    quick_fingerprint,
    read_block,
    scale_coordinates,
    scan_segy,
    textual_to_str,
)
from descatter.tasks.errors import ConfigError, InputNotFoundError, SampleRangeError, SegyFormatError


# ---------------------------------------------------------------- scan: layout


def test_rev1_positions_and_sizes(hand_segy, layout):
    made = hand_segy(n_samples=12, interval_us=500, n_traces=5, measurement_system=2)
    info = scan_segy(made.path, layout)
    assert info.n_samples == 12  # rev 1 (2002): binary header bytes 3221-3222
    assert info.sample_interval_us == 500 and info.dt_s == 0.0005  # rev 1: bytes 3217-3218
    assert info.format_code == 5 and info.sample_bytes == 4  # rev 1: 3225-3226, code 5 = 4-byte IEEE
    assert info.measurement_system == 2  # rev 1: bytes 3255-3256, 2 = feet
    assert info.revision == (1, 0)  # rev 1: bytes 3501-3502 hold 0x0100
    assert info.data_offset == 3600  # rev 1: 3200-byte textual + 400-byte binary header
    assert info.trace_bytes == 240 + 12 * 4  # rev 1: 240-byte trace header + samples
    assert info.n_traces == 5 and info.size == made.path.stat().st_size
    assert info.byte_order == "big" and info.textual_encoding == "ebcdic"
    raw = made.path.read_bytes()
    assert info.textual == raw[:3200] and info.binary == raw[3200:3600] and info.extended_textual == b""


def test_rev2_little_endian_with_byte_order_word_and_extended_fields(hand_segy, layout):
    made = hand_segy(
        order="<", revision=(2, 0), n_samples=40_000, n_traces=2, n_extended=1,
        binary_extra=(
            (3221, "H", 1234),  # rev 1: samples per trace, overridden by the extended field
            (3297, "I", 0x01020304),  # rev 2.0: byte-order constant, written in the file's order
            (3269, "i", 40_000),  # rev 2.0: extended samples per trace, overrides 3221-3222
            (3273, "d", 2000.0),  # rev 2.0: extended sample interval, IEEE double
            (3521, "Q", 3600 + 3200),  # rev 2.0: byte offset of the first trace
            (3513, "Q", 2),  # rev 2.0: number of traces in the file
        ),
    )
    info = scan_segy(made.path, layout)
    assert info.byte_order == "little" and info.revision == (2, 0)
    assert info.n_samples == 40_000 and info.sample_interval_us == 2000
    assert info.data_offset == 6800 and len(info.extended_textual) == 3200  # rev 1: 3505-3506
    samples, _, _ = read_block(info, 0, 2)
    assert np.array_equal(samples, made.samples)


def test_byte_order_detected_from_format_code_without_rev2_word(hand_segy, layout):
    made = hand_segy(order="<", format_code=3)
    info = scan_segy(made.path, layout)
    assert info.byte_order == "little" and info.format_code == 3
    assert np.array_equal(read_block(info, 0, info.n_traces)[0], made.samples)


@pytest.mark.parametrize("order", [">", "<"])
def test_rev2_byte_order_word_decides_even_when_the_format_code_is_invalid(hand_segy, layout, order):
    # rev 2.0 (2017): bytes 3297-3300 hold 0x01020304 in the file's byte order; with it the
    # reader trusts that order and names the (invalid) code 17 instead of "not a SEG-Y file"
    made = hand_segy(order=order, revision=(2, 0), binary_extra=((3297, "I", 0x01020304), (3225, "h", 17)))
    with pytest.raises(SegyFormatError, match=r"format code 17 \(unknown"):
        scan_segy(made.path, layout)


def test_ascii_textual_header_is_detected(hand_segy, layout):
    text = "".join(f"C{i:2d} ASCII CARD".ljust(80) for i in range(1, 41)).encode("ascii")
    info = scan_segy(hand_segy(textual=text).path, layout)
    assert info.textual_encoding == "ascii"  # rev 2.0 allows ASCII textual headers
    assert textual_to_str(info.textual).splitlines()[1] == "C 2 ASCII CARD"


def test_textual_to_str_decodes_ebcdic_cards():
    # EBCDIC code page 037: 'C' = 0xC3, space = 0x40, '1' = 0xF1 (IBM CP037 table)
    raw = bytes([0xC3, 0x40, 0xF1]) + b"\x40" * 77 + bytes([0xC3, 0xF4, 0xF0]) + b"\x40" * 77
    assert textual_to_str(raw) == "C 1\nC40"


def test_zero_in_trace_header_means_not_set(hand_segy, layout):
    made = hand_segy(trace_extra=((1, 115, "H", 0), (2, 117, "H", 0)))
    assert scan_segy(made.path, layout).n_traces == 3


def test_layout_moves_the_checked_trace_fields(hand_segy, layout):
    # samples per trace recorded at bytes 233-234 instead of 115-116, which carries junk
    made = hand_segy(trace_extra=((None, 233, "H", 8), (None, 115, "H", 999)))
    with pytest.raises(SegyFormatError):
        scan_segy(made.path, layout)
    moved = dict(layout, n_samples=(233, 2))
    assert scan_segy(made.path, moved).n_samples == 8
    with pytest.raises(ConfigError, match="n_samples"):
        scan_segy(made.path, dict(layout, n_samples=(240, 2)))


# ---------------------------------------------------------------- scan: errors


def test_missing_file(tmp_path, layout):
    with pytest.raises(InputNotFoundError, match="nothere.sgy"):
        scan_segy(tmp_path / "nothere.sgy", layout)


def test_too_small(tmp_path, layout):
    path = tmp_path / "small.sgy"
    path.write_bytes(b"\0" * 3599)
    with pytest.raises(SegyFormatError, match=r"small\.sgy is not a SEG-Y file: 3599 bytes"):
        scan_segy(path, layout)


def test_implausible_binary_header_in_both_orders(tmp_path, layout):
    path = tmp_path / "junk.sgy"
    path.write_bytes(b"\x7f" * 8000)
    with pytest.raises(SegyFormatError, match=r"junk\.sgy is not a SEG-Y file.*32639"):
        scan_segy(path, layout)


def test_unsupported_format_code(hand_segy, layout):
    made = hand_segy(binary_extra=((3225, "h", 6),))  # rev 2.0: code 6 = 8-byte IEEE
    with pytest.raises(SegyFormatError) as err:
        scan_segy(made.path, layout)
    message = str(err.value)
    assert "hand.sgy" in message and "format code 6 (8-byte IEEE" in message
    assert all(f"{c} (" in message for c in (1, 2, 3, 5, 8))


@pytest.mark.parametrize(
    "extra, match",
    [
        (((3505, "h", -1),), r"variable number of extended textual headers \(-1"),  # rev 1: 3505-3506
        (((3507, "i", 1),), r"1 additional 240-byte trace headers"),  # rev 2.0: 3507-3510
        (((3521, "Q", 4000),), r"byte offset 4000.*standard position 3600"),  # rev 2.0: 3521-3528
        (((3529, "i", 2),), r"2 data trailer stanzas"),  # rev 2.0: 3529-3532
        (((3529, "i", -1),), r"-1 data trailer stanzas"),
        (((3273, "d", 2000.5),), r"extended sample interval 2000.5"),  # rev 2.0: 3273-3280
        (((3513, "Q", 7),), r"declares 7 traces.*holds 3"),  # rev 2.0: 3513-3520
    ],
)
def test_rev2_layouts_refused_clearly(hand_segy, layout, extra, match):
    made = hand_segy(revision=(2, 0), binary_extra=extra)
    with pytest.raises(SegyFormatError, match=match) as err:
        scan_segy(made.path, layout)
    assert "hand.sgy" in str(err.value)


def test_rev2_fields_ignored_in_a_rev1_file(hand_segy, layout):
    # rev 1 (2002) leaves bytes 3261-3500 and 3507-3600 unassigned: junk there is not read
    made = hand_segy(revision=(1, 0), binary_extra=((3507, "i", 5), (3269, "i", 77)))
    assert scan_segy(made.path, layout).n_samples == 8


def test_zero_traces(hand_segy, layout):
    made = hand_segy(n_traces=0)
    with pytest.raises(SegyFormatError, match="holds no traces"):
        scan_segy(made.path, layout)


def test_truncated_file_names_whole_traces_and_the_partial_start(hand_segy, layout):
    made = hand_segy(n_traces=4, n_samples=10, tail=b"\0" * 100)
    with pytest.raises(SegyFormatError) as err:
        scan_segy(made.path, layout)
    start = 3600 + 4 * (240 + 40)
    assert "4 whole traces" in str(err.value) and f"byte offset {start}" in str(err.value)
    assert "100 bytes" in str(err.value) and "hand.sgy" in str(err.value)


def test_trace_header_disagreeing_on_sample_count(hand_segy, layout):
    made = hand_segy(n_traces=6, trace_extra=((4, 115, "H", 9),))  # rev 1: trace bytes 115-116
    with pytest.raises(SegyFormatError) as err:
        scan_segy(made.path, layout)
    message = str(err.value)
    assert "trace 4 says 9" in message and "binary header says 8" in message and "115-116" in message


def test_trace_header_disagreeing_on_sample_interval(hand_segy, layout):
    made = hand_segy(n_traces=6, trace_extra=((2, 117, "H", 4000), (5, 117, "H", 1000)))
    with pytest.raises(SegyFormatError, match=r"trace 2 says 4000.*117-118.*binary header says 2000"):
        scan_segy(made.path, layout)


def test_binary_count_missing_taken_from_first_trace(hand_segy, layout):
    made = hand_segy(binary_extra=((3221, "H", 0), (3217, "H", 0)))
    info = scan_segy(made.path, layout)
    assert (info.n_samples, info.sample_interval_us) == (8, 2000)


# ---------------------------------------------------------------- read_block


@pytest.mark.parametrize("format_code", [1, 2, 3, 5, 8])
@pytest.mark.parametrize("order", [">", "<"])
def test_every_supported_format_reads_what_struct_wrote(hand_segy, layout, format_code, order):
    made = hand_segy(format_code=format_code, order=order, n_traces=5, n_samples=7)
    info = scan_segy(made.path, layout)
    samples, headers, digest = read_block(info, 1, 4)
    assert samples.dtype == np.float32 and samples.shape == (3, 7)
    assert np.array_equal(samples, made.samples[1:4])
    tb = 240 + 7 * info.sample_bytes
    raw = made.path.read_bytes()[3600 + tb : 3600 + 4 * tb]
    assert np.array_equal(headers, np.frombuffer(raw, np.uint8).reshape(3, tb)[:, :240])
    assert digest == struct.pack(">IQ", zlib.crc32(raw), len(raw))  # zlib: an independent CRC-32
    fields = decode_fields(headers, layout, info.byte_order)
    for name in ("field_record", "channel", "offset", "source_x", "receiver_y", "coordinate_scalar"):
        assert np.array_equal(fields[name], made.fields[name][1:4]), name


def test_digest_of_a_large_block_is_hashed_alongside(hand_segy, layout):
    made = hand_segy(n_traces=300, n_samples=1000)  # > 1 MiB: hashed on a second thread
    info = scan_segy(made.path, layout)
    samples, _, digest = read_block(info, 0, 300)
    body = made.path.read_bytes()[3600:]
    assert digest == struct.pack(">IQ", zlib.crc32(body), len(body))
    assert np.array_equal(samples, made.samples)
    assert read_block(info, 0, 300, digest=False)[2] is None


def test_ibm_overflow_names_file_and_trace(hand_segy, layout, tmp_path):
    made = hand_segy(format_code=1, n_traces=4, n_samples=5)
    data = bytearray(made.path.read_bytes())
    struct.pack_into(">I", data, 3600 + 2 * (240 + 20) + 240 + 3 * 4, 0x7FFFFFFF)  # trace 2, sample 3
    made.path.write_bytes(bytes(data))
    info = scan_segy(made.path, layout)
    with pytest.raises(SampleRangeError, match=r"hand\.sgy: trace 2, sample 3 is 7\.2370051e\+75"):
        read_block(info, 0, 4)
    assert read_block(info, 0, 2)[0].shape == (2, 5)


def test_block_bounds_and_changed_file(hand_segy, layout):
    made = hand_segy()
    info = scan_segy(made.path, layout)
    assert read_block(info, 3, 3)[0].shape == (0, 8)  # at the very end of the file
    empty = read_block(info, 2, 2)
    assert empty[0].shape == (0, 8) and empty[1].shape == (0, 240)
    assert empty[2] == struct.pack(">IQ", 0, 0)
    with pytest.raises(IndexError, match="0:3"):
        read_block(info, 2, 4)
    with open(made.path, "ab") as f:
        f.write(b"\0" * 10)
    with pytest.raises(SegyFormatError, match="changed since it was scanned"):
        read_block(info, 0, 1)


@pytest.mark.parametrize("key", [(1, "big"), (5, "big"), (5, "little")])
def test_files_written_by_segyio(segyio_files, layout, key):
    path, wrote = segyio_files[key]
    info = scan_segy(path, layout)
    assert info.byte_order == key[1] and info.format_code == key[0]
    samples, headers, _ = read_block(info, 0, info.n_traces)
    with segyio.open(str(path), ignore_geometry=True, endian=key[1]) as f:  # segyio: independent reader
        f.mmap()
        theirs = f.trace.raw[:]
        assert info.n_samples == len(f.samples) and info.sample_interval_us == segyio.tools.dt(f)
        tf = segyio.TraceField
        for name, field in (("field_record", tf.FieldRecord), ("channel", tf.TraceNumber), ("offset", tf.offset),
                            ("source_x", tf.SourceX), ("receiver_y", tf.GroupY),
                            ("receiver_elevation", tf.ReceiverGroupElevation)):
            assert np.array_equal(decode_fields(headers, layout, info.byte_order)[name], f.attributes(field)[:])
            assert np.array_equal(decode_fields(headers, layout, info.byte_order)[name], wrote[name])
    assert np.array_equal(samples, theirs)
    if key[0] == 5:
        assert np.array_equal(samples, wrote["samples"])


# ---------------------------------------------------------------- fields and coordinates


@settings(max_examples=60, deadline=None)
@given(st.lists(st.integers(-(2**31), 2**31 - 1), min_size=1, max_size=20), st.sampled_from(["big", "little"]))
def test_decode_fields_reads_twos_complement_as_struct_packs_it(values, order):
    # SEG-Y rev 1 (2002) section 2: binary values are two's complement integers
    headers = np.zeros((len(values), 240), np.uint8)
    o = ">" if order == "big" else "<"
    for i, v in enumerate(values):
        headers[i, 72:76] = np.frombuffer(struct.pack(o + "i", v), np.uint8)  # bytes 73-76
        headers[i, 68:70] = np.frombuffer(struct.pack(o + "h", v % 65536 - 32768), np.uint8)  # 69-70
    fields = decode_fields(headers, {"source_x": (73, 4), "elevation_scalar": (69, 2)}, order)
    assert fields["source_x"].dtype == np.int32 and fields["source_x"].tolist() == values
    assert fields["elevation_scalar"].tolist() == [v % 65536 - 32768 for v in values]


def test_decode_fields_rejects_bad_layout():
    with pytest.raises(ConfigError, match="width 3"):
        decode_fields(np.zeros((1, 240), np.uint8), {"x": (1, 3)}, "big")
    with pytest.raises(ConfigError, match="'x' at byte 239"):
        decode_fields(np.zeros((1, 240), np.uint8), {"x": (239, 4)}, "big")


def _geometry(**overrides):
    base = dict(
        source_x=np.array([123456, 123456, 123456]), source_y=np.array([10, -10, 0]),
        receiver_x=np.array([5, 5, 5]), receiver_y=np.array([7, 7, 7]),
        source_elevation=np.array([1000, 1000, 1000]), receiver_elevation=np.array([-20, 0, 20]),
        offset=np.array([100, -100, 0]),
        coordinate_scalar=np.array([-100, 10, 0]), elevation_scalar=np.array([-10, 1, 0]),
        coordinate_units=np.array([1, 1, 0]),
    )
    return {**base, **overrides}


def test_scalars_follow_seg_y_rev1():
    # SEG-Y rev 1 (2002) bytes 69-72: positive multiplies, negative divides, 0 means 1
    out = scale_coordinates(_geometry(), 1)
    assert out["source_x"].tolist() == [1234.56, 1234560.0, 123456.0]
    assert out["source_y"].tolist() == [0.1, -100.0, 0.0]
    assert out["receiver_elevation"].tolist() == [-2.0, 0.0, 20.0]
    assert out["offset"].tolist() == [100.0, -100.0, 0.0]
    assert out.unit == "m" and out.source_unit == "m"
    assert set(out) == {"source_x", "source_y", "receiver_x", "receiver_y",
                        "source_elevation", "receiver_elevation", "offset"}


def test_feet_become_metres():
    # 1 international foot = 0.3048 m exactly (international yard and pound agreement, 1959)
    out = scale_coordinates(_geometry(), 2)
    assert out["offset"].tolist() == [100 * 0.3048, -100 * 0.3048, 0.0]
    assert out["source_elevation"][0] == pytest.approx(100 * 0.3048, rel=1e-15)
    assert out.unit == "m" and out.source_unit == "ft"
    unknown = scale_coordinates(_geometry(), 0)
    assert unknown.unit == "unknown" and unknown["offset"].tolist() == [100.0, -100.0, 0.0]


@pytest.mark.parametrize("code", [2, 3, 4])
def test_geographic_coordinates_refused(code):
    # SEG-Y rev 1 / rev 2.0 bytes 89-90: 2 arc seconds, 3 decimal degrees, 4 DMS
    with pytest.raises(SegyFormatError, match=rf"trace 1: coordinate units {code}.*project them first"):
        scale_coordinates(_geometry(coordinate_units=np.array([1, code, code])), 1)


# ---------------------------------------------------------------- fingerprint


def test_quick_fingerprint_sees_headers_and_end_traces_not_middle_samples(hand_segy, layout, tmp_path):
    made = hand_segy(n_traces=5, n_samples=6)
    base = quick_fingerprint(scan_segy(made.path, layout))
    assert base == quick_fingerprint(scan_segy(made.path, layout)) and len(base) == 32
    trace = 240 + 24

    def variant(name, offset):
        path = tmp_path / name
        shutil.copy(made.path, path)
        data = bytearray(path.read_bytes())
        data[offset] ^= 0xFF
        path.write_bytes(bytes(data))
        return quick_fingerprint(scan_segy(path, layout))

    assert variant("h.sgy", 3600 + 2 * trace + 8) != base  # a trace header byte (field record)
    assert variant("t.sgy", 100) != base  # textual header
    assert variant("last.sgy", 3600 + 4 * trace + 240 + 5) != base  # a sample of the last trace
    # documented limitation: a middle trace's samples alone are not covered
    assert variant("mid.sgy", 3600 + 2 * trace + 240 + 5) == base
