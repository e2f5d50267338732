"""Writing SEG-Y: header builders, byte swapping, the atomic writer.

Independent checks: byte positions of SEG-Y rev 1 (2002) / rev 2.0 (2017)
read back with ``struct``; segyio (an independent implementation) for field
tables and for reading what we write.
"""

from __future__ import annotations

import struct

import numpy as np
import pytest
import segyio
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from descatter.storage.segy import decode_fields, read_block, scan_segy
from descatter.storage.segy_headers import BINARY_HEADER_FIELDS, TRACE_HEADER_FIELDS
from descatter.storage.segy_write import (
    SegyWriter,
    build_binary_header,
    build_textual_header,
    build_trace_headers,
    swap_binary_header,
    swap_trace_headers,
)
from descatter.tasks.errors import ConfigError, SampleRangeError, SegyFormatError

ALL_TRACE_FIELDS = {name: (byte, width) for name, byte, width in TRACE_HEADER_FIELDS}


def _segyio_offsets(enum) -> list[int]:
    return sorted({v for k, v in vars(enum).items() if isinstance(v, int) and not k.startswith("_")})


# ---------------------------------------------------------------- field tables vs segyio


def test_trace_header_table_matches_segyio(tmp_path):
    # segyio writes -1 into each of its TraceField offsets; the 0xFF bytes give start and width
    offsets = [o for o in _segyio_offsets(segyio.TraceField) if o <= 232]  # 233-240 unassigned (rev 1)
    spec = segyio.spec()
    spec.format, spec.samples, spec.tracecount = 5, [0.0], len(offsets)
    path = str(tmp_path / "fields.sgy")
    with segyio.create(path, spec) as f:
        for i, off in enumerate(offsets):
            f.header[i] = {off: -1}
            f.trace[i] = np.zeros(1, np.float32)
    raw = np.frombuffer(open(path, "rb").read()[3600:], np.uint8).reshape(len(offsets), 244)[:, :240]
    theirs = {}
    for i, off in enumerate(offsets):
        hit = np.flatnonzero(raw[i] == 0xFF) + 1
        assert hit[0] == off and np.array_equal(hit, np.arange(off, off + len(hit)))
        theirs[off] = len(hit)
    ours = {byte: width for _, byte, width in TRACE_HEADER_FIELDS}
    assert ours == theirs


def test_binary_header_table_matches_segyio(tmp_path):
    spec = segyio.spec()
    spec.format, spec.samples, spec.tracecount = 5, [0.0], 1
    path = str(tmp_path / "bin.sgy")
    ours = {byte: width for _, byte, width in BINARY_HEADER_FIELDS}
    offsets = [o for o in _segyio_offsets(segyio.BinField) if o < 3507]  # segyio cannot write 3507
    for off in offsets:
        with segyio.create(path, spec) as f:
            f.trace[0] = np.zeros(1, np.float32)
        with segyio.open(path, "r+", ignore_geometry=True) as f:
            f.bin.update({off: -1})
        raw = np.frombuffer(open(path, "rb").read()[3200:3600], np.uint8)
        hit = np.flatnonzero(raw == 0xFF) + 3201
        assert hit[0] == off and ours[off] == len(hit), off
    # rev 2.0 fields segyio does not name: extended intervals (8-byte doubles) and 3297-3532
    assert ours[3273] == ours[3281] == ours[3513] == ours[3521] == 8 and ours[3297] == 4


# ---------------------------------------------------------------- swapping


@settings(max_examples=50, deadline=None)
@given(hnp.arrays(np.uint8, st.tuples(st.integers(0, 5), st.just(240))))
def test_trace_swap_twice_is_identity_and_reverses_each_field(headers):
    swapped = swap_trace_headers(headers)
    assert np.array_equal(swap_trace_headers(swapped), headers)
    big = decode_fields(headers, ALL_TRACE_FIELDS, "big")
    little = decode_fields(swapped, ALL_TRACE_FIELDS, "little")
    assert all(np.array_equal(big[k], little[k]) for k in big)
    assert np.array_equal(swapped[:, 232:], headers[:, 232:])  # rev 1: 233-240 unassigned


@settings(max_examples=50, deadline=None)
@given(st.binary(min_size=400, max_size=400))
def test_binary_swap_twice_is_identity_and_swaps_8_byte_fields_whole(raw):
    swapped = swap_binary_header(raw)
    assert swap_binary_header(swapped) == raw
    assert swapped[72:80] == raw[72:80][::-1]  # rev 2.0: 3273-3280 extended interval, double
    assert swapped[312:320] == raw[312:320][::-1]  # rev 2.0: 3513-3520 trace count, 8 bytes
    assert swapped[300:302] == raw[300:302]  # rev 2.0: 3501, 3502 one byte each
    assert swapped[24:26] == raw[24:26][::-1]  # rev 1: 3225-3226 format code


# ---------------------------------------------------------------- builders


def test_textual_header_cards():
    raw = build_textual_header(["FIRST LINE", "", "x" * 76])
    assert len(raw) == 3200  # rev 1 (2002): 40 cards x 80 columns, EBCDIC
    text = raw.decode("cp037")
    assert text[:80] == "C 1 FIRST LINE".ljust(80) and text[80:84] == "C 2 " and text[3120:3124] == "C40 "
    assert raw[0] == 0xC3  # 'C' in EBCDIC code page 037
    with pytest.raises(ValueError):
        build_textual_header(["y" * 77])
    with pytest.raises(ValueError):
        build_textual_header([""] * 41)


def test_binary_header_positions():
    raw = build_binary_header(sample_interval_us=4000, n_samples=1501, format_code=5,
                              measurement_system=2, n_extended_textual=1)
    assert len(raw) == 400
    get = lambda byte, code: struct.unpack_from(">" + code, raw, byte - 3201)[0]  # noqa: E731
    assert get(3217, "h") == 4000  # rev 1: sample interval
    assert get(3221, "h") == 1501  # rev 1: samples per data trace
    assert get(3225, "h") == 5  # rev 1: format code
    assert get(3255, "h") == 2  # rev 1: measurement system
    assert raw[300:302] == b"\x01\x00"  # rev 1: revision 0x0100
    assert get(3503, "h") == 1 and get(3505, "h") == 1  # rev 1: fixed length, extended textual
    assert get(3297, "I") == 0  # no rev 2.0 byte-order word in a rev 1 header
    rev2 = build_binary_header(sample_interval_us=250, n_samples=70_000, format_code=1, revision=(2, 0))
    assert struct.unpack_from(">I", rev2, 96)[0] == 0x01020304  # rev 2.0: 3297-3300
    assert struct.unpack_from(">i", rev2, 68)[0] == 70_000  # rev 2.0: 3269-3272 extended samples
    with pytest.raises(ValueError, match="n_samples = 70000"):
        build_binary_header(sample_interval_us=250, n_samples=70_000, format_code=1)
    with pytest.raises(SegyFormatError, match="format code 6"):
        build_binary_header(sample_interval_us=250, n_samples=10, format_code=6)


@settings(max_examples=60, deadline=None)
@given(st.data())
def test_build_trace_headers_round_trips_through_decode_fields(data):
    n = data.draw(st.integers(0, 6))
    names = data.draw(st.lists(st.sampled_from(sorted(ALL_TRACE_FIELDS)), unique=True, max_size=12))
    fields = {}
    for name in names:
        width = ALL_TRACE_FIELDS[name][1]
        lo, hi = -(1 << (8 * width - 1)), (1 << (8 * width - 1)) - 1
        fields[name] = np.array(data.draw(st.lists(st.integers(lo, hi), min_size=n, max_size=n)), dtype=np.int64)
    headers = build_trace_headers(fields, ALL_TRACE_FIELDS, n)
    assert headers.shape == (n, 240) and headers.dtype == np.uint8
    back = decode_fields(headers, {k: ALL_TRACE_FIELDS[k] for k in names}, "big")
    assert all(np.array_equal(back[k], fields[k]) for k in names)


def test_build_trace_headers_positions_and_errors(layout):
    headers = build_trace_headers({"source_x": [1, -2], "coordinate_scalar": -100, "coordinate_units": 1}, layout, 2)
    assert struct.unpack_from(">i", headers[1].tobytes(), 72)[0] == -2  # rev 1: 73-76
    assert struct.unpack_from(">h", headers[0].tobytes(), 70)[0] == -100  # rev 1: 71-72
    assert struct.unpack_from(">h", headers[0].tobytes(), 88)[0] == 1  # rev 1: 89-90
    with pytest.raises(KeyError, match="bogus"):
        build_trace_headers({"bogus": 1}, layout, 1)
    with pytest.raises(SampleRangeError, match=r"'coordinate_scalar'.*trace 1 has 40000"):
        build_trace_headers({"coordinate_scalar": [1, 40000]}, layout, 2)
    with pytest.raises(SampleRangeError, match="trace 0 has 1.5"):
        build_trace_headers({"source_x": [1.5]}, layout, 1)
    with pytest.raises(ConfigError, match="overlap"):
        build_trace_headers({"a": 1, "b": 2}, {"a": (1, 4), "b": (3, 2)}, 1)


# ---------------------------------------------------------------- writer


def _write(path, info_like, headers, samples, fmt, order="big"):
    with SegyWriter(path, textual=info_like.textual, binary=info_like.binary, n_samples=samples.shape[1],
                    sample_format=fmt, byte_order=order, extended_textual=info_like.extended_textual) as w:
        w.write(headers[:3], samples[:3])
        w.write(headers[3:], samples[3:])


@pytest.mark.parametrize("key", [(5, "big"), (5, "little"), (1, "big")])
def test_write_what_we_read_gives_the_same_bytes(segyio_files, layout, tmp_path, key):
    path, _ = segyio_files[key]
    info = scan_segy(path, layout)
    samples, headers, _ = read_block(info, 0, info.n_traces)
    out = tmp_path / "copy.sgy"
    _write(out, info, headers, samples, "ieee" if key[0] == 5 else "ibm", key[1])
    # byte identity for IEEE; for IBM too, since segyio wrote normalised words
    assert out.read_bytes() == path.read_bytes()


def test_round_trip_with_extended_textual_and_rev2(hand_segy, layout, tmp_path):
    made = hand_segy(revision=(2, 0), n_extended=2, n_traces=6,
                     binary_extra=((3297, "I", 0x01020304), (3513, "Q", 6), (3521, "Q", 3600 + 6400)))
    info = scan_segy(made.path, layout)
    samples, headers, _ = read_block(info, 0, 6)
    out = tmp_path / "copy.sgy"
    _write(out, info, headers, samples, "ieee")
    assert out.read_bytes() == made.path.read_bytes()
    # fewer traces: the rev 2.0 trace count (3513-3520) follows what is written
    with SegyWriter(out, textual=info.textual, binary=info.binary, n_samples=8, sample_format="ieee",
                    extended_textual=info.extended_textual) as w:
        w.write(headers[:2], samples[:2])
    assert scan_segy(out, layout).n_traces == 2


@pytest.mark.parametrize("fmt, code", [("ieee", 5), ("ibm", 1)])
def test_files_we_write_are_read_by_segyio(tmp_path, layout, fmt, code):
    rng = np.random.default_rng(21)
    n, ns = 9, 33
    samples = (rng.standard_normal((n, ns)) * 50).astype(np.float32)
    fields = {"field_record": np.arange(n) + 10, "offset": rng.integers(-3000, 3000, n),
              "source_x": rng.integers(-10**8, 10**8, n), "coordinate_scalar": np.full(n, -10),
              "n_samples": np.full(n, ns), "interval_us": np.full(n, 1000)}
    headers = build_trace_headers(fields, layout, n)
    path = tmp_path / f"ours_{fmt}.sgy"
    with SegyWriter(path, textual=build_textual_header(["WRITTEN BY TEST"]),
                    binary=build_binary_header(sample_interval_us=1000, n_samples=ns, format_code=code),
                    n_samples=ns, sample_format=fmt) as w:
        w.write(headers, samples)
    with segyio.open(str(path), ignore_geometry=True) as f:  # segyio: independent reader
        f.mmap()
        assert f.bin[segyio.BinField.Format] == code and len(f.samples) == ns and f.tracecount == n
        theirs = f.trace.raw[:]
        tf = segyio.TraceField
        assert np.array_equal(f.attributes(tf.offset)[:], fields["offset"])
        assert np.array_equal(f.attributes(tf.SourceX)[:], fields["source_x"])
        assert np.array_equal(f.attributes(tf.SourceGroupScalar)[:], fields["coordinate_scalar"])
        assert segyio.tools.wrap(f.text[0]).splitlines()[0].startswith("C 1 WRITTEN BY TEST")
    if fmt == "ieee":
        assert np.array_equal(theirs, samples)
    else:  # IBM keeps 21-24 bits: relative error <= 2**-21 (bound of float32_to_ibm)
        assert np.all(np.abs(theirs - samples) <= 2.0**-21 * np.abs(samples))
        assert not np.array_equal(theirs, samples)


def test_big_to_little_conversion_read_by_segyio(segyio_files, layout, tmp_path):
    path, wrote = segyio_files[5, "big"]
    info = scan_segy(path, layout)
    samples, headers, _ = read_block(info, 0, info.n_traces)
    out = tmp_path / "little.sgy"
    with SegyWriter(out, textual=info.textual, binary=swap_binary_header(info.binary), n_samples=info.n_samples,
                    sample_format="ieee", byte_order="little") as w:
        w.write(swap_trace_headers(headers), samples)
    with segyio.open(str(out), ignore_geometry=True, endian="little") as f:
        assert np.array_equal(f.trace.raw[:], samples)
        assert np.array_equal(f.attributes(segyio.TraceField.SourceX)[:], wrote["source_x"])
    assert scan_segy(out, layout).byte_order == "little"


@pytest.mark.parametrize("fmt", ["int32", "int16", "int8"])
def test_integer_formats_round_trip_and_refuse_out_of_range(tmp_path, layout, fmt):
    limit = {"int32": 2**24, "int16": 2**15 - 1, "int8": 127}[fmt]
    samples = np.array([[-limit, 0, 3, limit]], np.float32)
    code = {"int32": 2, "int16": 3, "int8": 8}[fmt]
    binary = build_binary_header(sample_interval_us=2000, n_samples=4, format_code=code)
    path = tmp_path / f"{fmt}.sgy"
    with SegyWriter(path, textual=build_textual_header([]), binary=binary, n_samples=4, sample_format=fmt) as w:
        w.write(np.zeros((1, 240), np.uint8), samples)
    info = scan_segy(path, layout)
    assert info.format_code == code and np.array_equal(read_block(info, 0, 1)[0], samples)
    too_big = {"int32": 2.0**31, "int16": 32768.0, "int8": 128.0}[fmt]
    with pytest.raises(SampleRangeError, match=r"trace 0 sample 2"):
        with SegyWriter(path, textual=build_textual_header([]), binary=binary, n_samples=4, sample_format=fmt) as w:
            w.write(np.zeros((1, 240), np.uint8), np.array([[0, 1, too_big, np.nan]], np.float32))


def test_writer_is_atomic(tmp_path):
    path = tmp_path / "atomic.sgy"
    binary = build_binary_header(sample_interval_us=2000, n_samples=4, format_code=1)
    with pytest.raises(SampleRangeError):
        with SegyWriter(path, textual=build_textual_header([]), binary=binary, n_samples=4, sample_format="ibm") as w:
            w.write(np.zeros((2, 240), np.uint8), np.ones((2, 4), np.float32))
            assert (tmp_path / "atomic.sgy.partial").exists() and not path.exists()
            w.write(np.zeros((1, 240), np.uint8), np.array([[0, np.inf, 0, 0]], np.float32))
    assert not path.exists() and not (tmp_path / "atomic.sgy.partial").exists()
    with pytest.raises(SegyFormatError, match="no traces"):
        with SegyWriter(path, textual=build_textual_header([]), binary=binary, n_samples=4, sample_format="ibm"):
            pass
    assert list(tmp_path.iterdir()) == []
    with SegyWriter(path, textual=build_textual_header([]), binary=binary, n_samples=4, sample_format="ibm") as w:
        w.write(np.zeros((1, 240), np.uint8), np.ones((1, 4), np.float32))
    assert list(tmp_path.iterdir()) == [path]  # renamed into place, no partial left


def test_writer_patches_binary_and_checks_trace_sample_counts(tmp_path, layout):
    # caller's binary header says format 5 and 99 samples; the writer makes it format 1, 4 samples
    binary = build_binary_header(sample_interval_us=2000, n_samples=99, format_code=5)
    path = tmp_path / "patched.sgy"
    with SegyWriter(path, textual=build_textual_header([]), binary=binary, n_samples=4, sample_format="ibm",
                    extended_textual=b"\x40" * 3200) as w:
        w.write(build_trace_headers({"n_samples": [4, 0]}, layout, 2), np.ones((2, 4), np.float32))
        with pytest.raises(SegyFormatError, match=r"trace 3 header says 5 samples"):
            w.write(build_trace_headers({"n_samples": [4, 5]}, layout, 2), np.ones((2, 4), np.float32))
    raw = path.read_bytes()
    assert struct.unpack_from(">h", raw, 3220)[0] == 4  # rev 1: 3221-3222 samples per trace
    assert struct.unpack_from(">h", raw, 3224)[0] == 1  # rev 1: 3225-3226 format code, 1 = IBM
    assert struct.unpack_from(">h", raw, 3504)[0] == 1  # rev 1: 3505-3506 extended textual count
    info = scan_segy(path, layout)
    assert info.n_traces == 2 and info.data_offset == 6800
    assert np.array_equal(read_block(info, 0, 2)[0], np.ones((2, 4), np.float32))
