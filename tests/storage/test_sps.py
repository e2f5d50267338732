"""SEG SPS reader and writer: hand-laid records, round trips, trace geometry."""

from __future__ import annotations

import time

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from descatter.storage.sps import (
    SpsGeometry,
    SpsPoints,
    SpsRelations,
    compare_with_headers,
    read_sps,
    sps_trace_geometry,
    write_sps,
)
from descatter.tasks.errors import ConfigError, GeometryError, InputNotFoundError
from descatter.tasks.geometry import trace_geometry

# SEG SPS rev 2.1 point record (S/R), columns as recalled from the standard's
# point record specification table: record type 1, line 2-11 (F10.2), point
# 12-21 (F10.2), 22-23 blank, point index 24, point code 25-26, static 27-30,
# point depth 31-34, datum 35-38, uphole time 39-40, water depth 41-46,
# easting 47-55, northing 56-65, elevation 66-71, day 72-74, time 75-80.
S_RECORD_21 = "".join([
    "S",            # 1
    "   1001.00",   # 2-11   line
    "   2035.50",   # 12-21  point
    "  ",           # 22-23  blank
    "1",            # 24     point index
    "E1",           # 25-26  point code
    "  12",         # 27-30  static (ms)
    "12.5",         # 31-34  point depth (m)
    " 100",         # 35-38  seismic datum (m)
    "25",           # 39-40  uphole time (ms)
    "   0.0",       # 41-46  water depth
    " 512345.6",    # 47-55  easting
    " 6789012.3",   # 56-65  northing
    " 123.4",       # 66-71  surface elevation
    "152",          # 72-74  day of year
    "134502",       # 75-80  time hhmmss
])

# SEG SPS rev 2.1 relation record (X), columns as recalled: field tape 2-7,
# field record 8-15 (I8), record increment 16, instrument code 17, source line
# 18-27, source point 28-37, source index 38, from channel 39-43, to channel
# 44-48, channel increment 49, receiver line 50-59, from receiver 60-69, to
# receiver 70-79, receiver index 80.
X_RECORD_21 = "".join([
    "X", "FT0001", "    1234", "1", "1", "   1001.00", "   2035.50", "1",
    "    1", "   48", "1", "   2001.00", "   3001.00", "   3048.00", "1",
])

# SEG SPS rev 1.0 (1993) point record, as recalled: line 2-17 (A16), point
# 18-25 (A8), point index 26, point code 27-28, static 29-32, point depth
# 33-36, datum 37-40, uphole time 41-42, water depth 43-46, then easting 47-55
# onwards as in rev 2.1.
S_RECORD_10 = "".join([
    "S", "1001            ", "  2035.5", "1", "E1", "  12", "  12", " 100", "25", "   0",
    " 512345.6", " 6789012.3", " 123.4", "152", "134502",
])


def write_text(path, *lines):
    path.write_text("\n".join(lines) + "\n")
    return path


def minimal_set(tmp_path, s_lines, r_lines, x_lines):
    return (write_text(tmp_path / "a.s", *s_lines), write_text(tmp_path / "a.r", *r_lines),
            write_text(tmp_path / "a.x", *x_lines))


R_RECORD_21 = "R" + S_RECORD_21[1:]


def test_hand_laid_rev21_records_parse_to_their_values(tmp_path):
    assert len(S_RECORD_21) == len(X_RECORD_21) == 80
    assert S_RECORD_21[46:55] == " 512345.6"  # columns 47-55
    paths = minimal_set(tmp_path, ["H00 SPS format version num.     SPS V2.1", S_RECORD_21], [R_RECORD_21],
                        [X_RECORD_21])
    sps = read_sps(*paths)
    s = sps.sources
    assert sps.revision == "2.1" and s.headers == ("H00 SPS format version num.     SPS V2.1",)
    assert (s.line[0], s.point[0], s.point_index[0], s.point_code[0]) == (1001.0, 2035.5, 1, "E1")
    assert (s.static[0], s.point_depth[0], s.datum[0], s.uphole_time[0], s.water_depth[0]) == \
        (12.0, 12.5, 100.0, 25.0, 0.0)
    assert (s.easting[0], s.northing[0], s.elevation[0]) == (512345.6, 6789012.3, 123.4)
    assert (s.day_of_year[0], s.time[0]) == (152.0, "134502")
    assert s.file_lines.tolist() == [2]
    x = sps.relations
    assert (x.field_tape[0], x.field_record[0], x.field_record_increment[0], x.instrument_code[0]) == \
        ("FT0001", 1234, 1, "1")
    assert (x.source_line[0], x.source_point[0], x.source_index[0]) == (1001.0, 2035.5, 1)
    assert (x.from_channel[0], x.to_channel[0], x.channel_increment[0]) == (1, 48, 1)
    assert (x.receiver_line[0], x.from_receiver[0], x.to_receiver[0], x.receiver_index[0]) == \
        (2001.0, 3001.0, 3048.0, 1)


def test_hand_laid_rev10_record_parses(tmp_path):
    paths = minimal_set(tmp_path, [S_RECORD_10], ["R" + S_RECORD_10[1:]], [])
    s = read_sps(*paths, revision="1.0").sources
    assert (s.line[0], s.point[0], s.point_index[0], s.point_code[0], s.static[0], s.datum[0]) == \
        (1001.0, 2035.5, 1, "E1", 12.0, 100.0)
    assert (s.easting[0], s.northing[0], s.elevation[0], s.time[0]) == (512345.6, 6789012.3, 123.4, "134502")


def test_blank_optional_fields_and_short_lines(tmp_path):
    short = S_RECORD_21[:24] + "  " + " " * 20 + S_RECORD_21[46:71]  # no static..water depth, no day/time
    paths = minimal_set(tmp_path, [short.rstrip()], [R_RECORD_21], [])
    s = read_sps(*paths).sources
    assert np.isnan([s.static[0], s.point_depth[0], s.water_depth[0], s.day_of_year[0]]).all()
    assert (s.point_code[0], s.time[0], s.elevation[0]) == ("", "", 123.4)


def test_column_override(tmp_path):
    # a producer that writes a 10-column easting in 46-55 and water depth in 41-45
    moved = S_RECORD_21[:40] + "  0.5" + "12512345.6" + S_RECORD_21[55:]
    paths = minimal_set(tmp_path, [moved], ["R" + moved[1:]], [])
    default = read_sps(*paths).sources
    assert (default.easting[0], default.water_depth[0]) == (2512345.6, 0.51)
    s = read_sps(*paths, columns={"easting": (46, 55), "water_depth": (41, 45)}).sources
    assert (s.easting[0], s.water_depth[0], s.northing[0]) == (12512345.6, 0.5, 6789012.3)
    with pytest.raises(ConfigError, match="unknown field 'eastings'"):
        read_sps(*paths, columns={"eastings": (47, 55)})
    with pytest.raises(ConfigError, match="revision"):
        read_sps(*paths, revision="3.0")


# --- errors ---------------------------------------------------------------------


def test_missing_file(tmp_path):
    paths = minimal_set(tmp_path, [S_RECORD_21], [R_RECORD_21], [X_RECORD_21])
    with pytest.raises(InputNotFoundError, match="a.nope") as err:
        read_sps(paths[0], tmp_path / "a.nope", paths[2])
    assert isinstance(err.value, FileNotFoundError)


@pytest.mark.parametrize("bad, message", [
    (S_RECORD_21[:46] + " 5123x5.6" + S_RECORD_21[55:], r"a\.s:3: columns 47-55 \(easting\) hold ' 5123x5.6'"),
    (S_RECORD_21[:1] + " " * 10 + S_RECORD_21[11:], r"a\.s:3: required field line \(columns 2-11\) is blank"),
    (S_RECORD_21[:23] + "x" + S_RECORD_21[24:], r"a\.s:3: columns 24-24 \(point_index\)"),
    ("R" + S_RECORD_21[1:], r"a\.s:3: record type 'R' in an SPS S file"),
])
def test_malformed_records_name_file_and_line(tmp_path, bad, message):
    paths = minimal_set(tmp_path, ["H00 header", S_RECORD_21, bad], [R_RECORD_21], [X_RECORD_21])
    with pytest.raises(GeometryError, match=message):
        read_sps(*paths)


def test_conflicting_duplicate_station(tmp_path):
    other = S_RECORD_21[:46] + " 512399.6" + S_RECORD_21[55:]
    paths = minimal_set(tmp_path, [S_RECORD_21, S_RECORD_21, other], [R_RECORD_21], [X_RECORD_21])
    sps = read_sps(*paths)
    with pytest.raises(GeometryError, match=r"appears twice with different positions, at .*a\.s:2 and .*a\.s:3"):
        sps_trace_geometry(sps, np.array([1234]), np.array([1]))


def test_trace_without_relation_and_relation_without_station(tmp_path):
    r_line = R_RECORD_21[:1] + "   2001.00" + "   3001.00" + R_RECORD_21[21:]
    paths = minimal_set(tmp_path, [S_RECORD_21], [r_line], [X_RECORD_21])
    sps = read_sps(*paths)
    with pytest.raises(GeometryError, match=r"1 trace\(s\) have no X record .*\(1234, 49\)"):
        sps_trace_geometry(sps, np.array([1234, 1234]), np.array([1, 49]))
    with pytest.raises(GeometryError, match=r"a\.x:1 names receiver line 2001.0, point 3002.0, index 1"):
        sps_trace_geometry(sps, np.array([1234]), np.array([2]))
    got = sps_trace_geometry(sps, np.array([1234]), np.array([1]))
    assert (got["receiver_x"][0], got["source_y"][0]) == (512345.6, 6789012.3)


def test_empty_relation_file(tmp_path):
    sps = read_sps(*minimal_set(tmp_path, [S_RECORD_21], [R_RECORD_21], ["H00 only a header"]))
    assert len(sps.relations) == 0 and sps.relations.headers == ("H00 only a header",)
    with pytest.raises(GeometryError, match="holds no X records"):
        sps_trace_geometry(sps, np.array([1]), np.array([1]))


def test_overlapping_relations_rejected(tmp_path):
    second = X_RECORD_21[:38] + "   40" + "   60" + X_RECORD_21[48:]
    paths = minimal_set(tmp_path, [S_RECORD_21], [R_RECORD_21], [X_RECORD_21, second])
    with pytest.raises(GeometryError, match=r"a\.x:1 and .*a\.x:2 .* overlapping channel ranges 1-48 and 40-60"):
        sps_trace_geometry(read_sps(*paths), np.array([1234]), np.array([1]))


def test_value_too_wide_for_its_columns(tmp_path):
    pts = SpsPoints("S", line=[1.0], point=[1.0], easting=[12345678.9], northing=[1.0])
    rel = SpsRelations(field_record=[1], source_line=[1.0], source_point=[1.0], from_channel=[1],
                       to_channel=[1], receiver_line=[1.0], from_receiver=[1.0], to_receiver=[1.0])
    with pytest.raises(GeometryError, match="easting = 12345678.9 does not fit columns 47-55"):
        write_sps(tmp_path, pts, pts, rel)


# --- round trips -----------------------------------------------------------------


def _points(draw_ints, n, record_type, rng_blank):
    def dec(lo, hi, scale):
        return draw_ints(lo, hi) / scale

    def maybe_blank(v):
        return np.where(rng_blank(n), np.nan, v)

    return SpsPoints(
        record_type, line=dec(0, 10**7 - 1, 100), point=dec(0, 10**7 - 1, 100), point_index=draw_ints(0, 9),
        point_code=np.array(["E1", "", "A", "V2"])[draw_ints(0, 3)], static=maybe_blank(draw_ints(-999, 9999)),
        point_depth=maybe_blank(dec(0, 999, 10)), datum=maybe_blank(draw_ints(-999, 9999)),
        uphole_time=maybe_blank(draw_ints(0, 99)), water_depth=maybe_blank(dec(0, 99999, 10)),
        easting=dec(0, 10**8 - 1, 10), northing=dec(0, 10**9 - 1, 10), elevation=maybe_blank(dec(-9999, 99999, 10)),
        day_of_year=maybe_blank(draw_ints(1, 366)), time=np.array(["134502", "", "000001"])[draw_ints(0, 2)],
        headers=["H00 SPS format version num.     SPS V2.1", "H26 made up for a test"],
    )


def _relations(draw_ints, n):
    return SpsRelations(
        field_tape=np.array(["FT0001", "", "7"])[draw_ints(0, 2)], field_record=draw_ints(0, 10**8 - 1),
        field_record_increment=draw_ints(1, 9), instrument_code=np.array(["1", "", "A"])[draw_ints(0, 2)],
        source_line=draw_ints(0, 10**7 - 1) / 100, source_point=draw_ints(0, 10**7 - 1) / 100,
        source_index=draw_ints(0, 9), from_channel=draw_ints(0, 99999), to_channel=draw_ints(0, 99999),
        channel_increment=draw_ints(1, 9), receiver_line=draw_ints(0, 10**7 - 1) / 100,
        from_receiver=draw_ints(0, 10**7 - 1) / 100, to_receiver=draw_ints(0, 10**7 - 1) / 100,
        receiver_index=draw_ints(0, 9),
    )


def assert_same_records(a, b):
    for name, values in a.fields().items():
        other = getattr(b, name)
        if values.dtype.kind == "f":
            np.testing.assert_array_equal(values, other, err_msg=name)
        else:
            assert values.tolist() == other.tolist(), name
    assert a.headers == b.headers


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(seed=st.integers(0, 2**32 - 1), n=st.integers(1, 40))
def test_write_read_round_trip_rev21(tmp_path, seed, n):
    rng = np.random.default_rng(seed)

    def draw_ints(lo, hi):
        return rng.integers(lo, hi + 1, n)

    sources = _points(draw_ints, n, "S", lambda k: rng.random(k) < 0.2)
    receivers = _points(draw_ints, n, "R", lambda k: rng.random(k) < 0.2)
    relations = _relations(draw_ints, n)
    paths = write_sps(tmp_path / "set", sources, receivers, relations)
    back = read_sps(*paths)
    for a, b in ((sources, back.sources), (receivers, back.receivers), (relations, back.relations)):
        assert_same_records(a, b)


@settings(max_examples=15, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(line=hnp.arrays(np.int64, 8, elements=st.integers(0, 10**6)),
       east=hnp.arrays(np.int64, 8, elements=st.integers(0, 10**8 - 1)))
def test_write_read_round_trip_rev10(tmp_path, line, east):
    pts = SpsPoints("R", line=line / 100, point=line[::-1] / 100, easting=east / 10, northing=east[::-1] / 10,
                    water_depth=np.full(8, 12.5), point_depth=np.full(8, np.nan))
    rel = SpsRelations(field_record=line % 10**4, source_line=line / 100, source_point=line / 100,
                       from_channel=line % 10**4, to_channel=line % 10**4, receiver_line=line / 100,
                       from_receiver=line / 100, to_receiver=line / 100)
    paths = write_sps([tmp_path / "p.s", tmp_path / "p.r", tmp_path / "p.x"], pts, pts, rel, revision="1.0")
    back = read_sps(*paths, revision="1.0")
    assert_same_records(pts, back.receivers)
    assert_same_records(rel, back.relations)


# --- per-trace geometry through X records -----------------------------------------


def synthetic_survey():
    """Three receiver lines, two source lines; positions from simple formulas
    so header coordinates can be computed without SPS."""
    def rec_xy(line, point):
        return 500_000.0 + (point - 3001) * 25.0, 6_000_000.0 + (line - 2001) * 200.0

    def src_xy(line, point):
        return 500_012.5 + (line - 1001) * 300.0, 5_999_950.0 + (point - 1) * 50.0

    rl, rp = np.meshgrid([2001.0, 2002.0, 2003.0], np.arange(3001.0, 3041.0), indexing="ij")
    rl, rp = rl.ravel(), rp.ravel()
    receivers = SpsPoints("R", line=rl, point=rp, easting=rec_xy(rl, rp)[0], northing=rec_xy(rl, rp)[1],
                          elevation=np.round(100 + rp % 7, 1))
    sl, spt = np.meshgrid([1001.0, 1002.0], np.arange(1.0, 11.0), indexing="ij")
    sl, spt = sl.ravel(), spt.ravel()
    sources = SpsPoints("S", line=sl, point=spt, easting=src_xy(sl, spt)[0], northing=src_xy(sl, spt)[1])
    # per shot: line 2001 on channels 1-40 forward, 2002 on 41-80 reversed,
    # 2003 on odd channels 81-159 (increment 2)
    n_shots = sl.size
    fr = 5000 + np.arange(n_shots)
    rel = SpsRelations(
        field_record=np.repeat(fr, 3), source_line=np.repeat(sl, 3), source_point=np.repeat(spt, 3),
        from_channel=np.tile([1, 41, 81], n_shots), to_channel=np.tile([40, 80, 159], n_shots),
        channel_increment=np.tile([1, 1, 2], n_shots), receiver_line=np.tile([2001.0, 2002.0, 2003.0], n_shots),
        from_receiver=np.tile([3001.0, 3040.0, 3001.0], n_shots), to_receiver=np.tile([3040.0, 3001.0, 3040.0], n_shots),
    )
    channels = np.concatenate([np.arange(1, 81), np.arange(81, 160, 2)])
    t_fr = np.repeat(fr, channels.size)
    t_ch = np.tile(channels, n_shots)
    shot = t_fr - 5000
    line = np.where(t_ch <= 40, 2001, np.where(t_ch <= 80, 2002, 2003))
    point = np.where(t_ch <= 40, 3000 + t_ch, np.where(t_ch <= 80, 3040 - (t_ch - 41), 3001 + (t_ch - 81) // 2))
    headers = dict(source_x=src_xy(sl[shot], spt[shot])[0], source_y=src_xy(sl[shot], spt[shot])[1],
                   receiver_x=rec_xy(line, point)[0], receiver_y=rec_xy(line, point)[1])
    perm = np.random.default_rng(0).permutation(t_fr.size)  # trace order in a file is arbitrary
    headers = {k: v[perm] for k, v in headers.items()}
    return sources, receivers, rel, t_fr[perm], t_ch[perm], headers, line[perm], point[perm]


def test_sps_geometry_matches_header_geometry_after_round_trip(tmp_path):
    sources, receivers, rel, fr, ch, headers, line, point = synthetic_survey()
    sps = read_sps(*write_sps(tmp_path, sources, receivers, rel))
    got = sps_trace_geometry(sps, fr, ch)
    for k in ("source_x", "source_y", "receiver_x", "receiver_y"):
        np.testing.assert_array_equal(got[k], headers[k], err_msg=k)
    np.testing.assert_array_equal(got["receiver_line"], line)
    np.testing.assert_array_equal(got["receiver_point"], point)
    a = trace_geometry(got["source_x"], got["source_y"], got["receiver_x"], got["receiver_y"])
    b = trace_geometry(headers["source_x"], headers["source_y"], headers["receiver_x"], headers["receiver_y"])
    for k in a:
        np.testing.assert_array_equal(a[k], b[k])
    assert compare_with_headers(got, **headers, tolerance_m=0.01)["trace"].size == 0


def test_compare_with_headers_reports_largest_first(tmp_path):
    sources, receivers, rel, fr, ch, headers, _, _ = synthetic_survey()
    got = sps_trace_geometry(SpsGeometry(sources, receivers, rel), fr, ch)
    headers["receiver_x"][10] += 12.0
    headers["source_y"][20] -= 40.0
    headers["receiver_y"][30] += 0.005  # under the tolerance
    report = compare_with_headers(got, **headers, tolerance_m=0.01)
    assert report["trace"].tolist() == [20, 10]
    np.testing.assert_allclose(report["error_m"], [40.0, 12.0])
    np.testing.assert_allclose(report["source_error_m"], [40.0, 0.0])
    assert report["receiver_line"][1] == got["receiver_line"][10]


def test_trace_geometry_is_vectorised_enough():
    sources, receivers, rel, fr, ch, _, _, _ = synthetic_survey()
    sps = SpsGeometry(sources, receivers, rel)
    big_fr, big_ch = np.tile(fr, 50), np.tile(ch, 50)  # 120,000 traces
    t0 = time.perf_counter()
    sps_trace_geometry(sps, big_fr, big_ch)
    assert time.perf_counter() - t0 < 2.0
