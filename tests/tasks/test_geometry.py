"""Geometry kernels against simple references and invariances."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from pydantic import ValidationError

from descatter.tasks.errors import GeometryError
from descatter.tasks.geometry import (
    SHOT_SUB_BITS,
    acquisition_summary,
    assign_stations,
    fold_counts,
    geometry_disagreement,
    merge_fold_counts,
    near_snap_boundary,
    shot_field_record,
    shot_ids,
    station_key_coordinates,
    station_key_numbers,
    station_keys,
    station_keys_from_numbers,
    station_layout,
    station_means,
    trace_geometry,
)
from descatter.tasks.geometry_config import GeometryConfig


def orthogonal_patch(*, azimuth_deg=30.0, rec_spacing=25.0, rec_lines=4, rec_line_spacing=200.0,
                     rec_per_line=24, src_spacing=50.0, src_lines=3, src_line_spacing=300.0,
                     src_per_line=8, jitter=0.0, seed=0, origin=(500_000.0, 6_000_000.0)):
    """A small orthogonal 3D patch: receiver lines along ``azimuth_deg``,
    source lines across them; every shot records every receiver."""
    rng = np.random.default_rng(seed)
    a = np.radians(azimuth_deg)
    u = np.array([np.sin(a), np.cos(a)])      # along receiver lines
    v = np.array([np.cos(a), -np.sin(a)])     # across
    ri, rl = np.meshgrid(np.arange(rec_per_line), np.arange(rec_lines), indexing="xy")
    rec = origin + np.outer(ri.ravel() * rec_spacing, u) + np.outer(rl.ravel() * rec_line_spacing, v)
    si, sl = np.meshgrid(np.arange(src_per_line), np.arange(src_lines), indexing="xy")
    src = (origin + np.outer(sl.ravel() * src_line_spacing + 12.5, u)
           + np.outer(si.ravel() * src_spacing - 50.0, v))
    rec = rec + rng.uniform(-jitter, jitter, rec.shape)
    src = src + rng.uniform(-jitter, jitter, src.shape)
    s_idx, r_idx = np.meshgrid(np.arange(len(src)), np.arange(len(rec)), indexing="ij")
    return src, rec, s_idx.ravel(), r_idx.ravel()


# --- trace geometry ---------------------------------------------------------


def test_offset_azimuth_midpoint_against_numpy():
    rng = np.random.default_rng(1)
    sx, sy, rx, ry = rng.uniform(-5000, 5000, (4, 1000))
    got = trace_geometry(sx, sy, rx, ry)
    # reference: numpy.hypot and numpy.arctan2, azimuth clockwise from north = atan2(east, north)
    dx, dy = rx - sx, ry - sy
    np.testing.assert_allclose(got["offset"], np.hypot(dx, dy), rtol=1e-15)
    np.testing.assert_allclose(got["azimuth"], np.degrees(np.arctan2(dx, dy)) % 360.0, rtol=1e-13, atol=1e-12)
    np.testing.assert_allclose(got["cmp_x"], (sx + rx) / 2)
    np.testing.assert_allclose(got["cmp_y"], (sy + ry) / 2)
    assert got["offset"].dtype == np.float64


@pytest.mark.parametrize("dx, dy, azimuth", [(0, 100, 0.0), (100, 0, 90.0), (0, -100, 180.0),
                                             (-100, 0, 270.0), (100, 100, 45.0), (0, 0, 0.0)])
def test_azimuth_compass_points(dx, dy, azimuth):
    # source-to-receiver azimuth, north = 0, east = 90 (compass convention)
    got = trace_geometry(np.array([10.0]), np.array([20.0]), np.array([10.0 + dx]), np.array([20.0 + dy]))
    assert got["azimuth"][0] == pytest.approx(azimuth)


def test_azimuth_stays_below_360():
    got = trace_geometry(np.array([0.0]), np.array([0.0]), np.array([-1e-300]), np.array([1.0]))
    assert 0.0 <= got["azimuth"][0] < 360.0


# --- station keys -----------------------------------------------------------


@given(st.integers(-2**31, 2**31 - 1), st.integers(-2**31, 2**31 - 1),
       st.integers(-2**31, 2**31 - 1), st.integers(-2**31, 2**31 - 1))
def test_key_packing_round_trips_and_sorts(i1, j1, i2, j2):
    keys = station_keys_from_numbers(np.array([i1, i2], float), np.array([j1, j2], float), step=1.0)
    line, point = station_key_numbers(keys, step=1.0)
    assert (line.tolist(), point.tolist()) == ([i1, i2], [j1, j2])
    assert (keys[0] < keys[1]) == ((i1, j1) < (i2, j2))


@settings(max_examples=300)
@given(st.integers(-10**7, 10**7), st.integers(-10**7, 10**7), st.sampled_from([0.5, 1.0, 2.5, 10.0]),
       st.floats(-0.45, 0.45), st.floats(-0.45, 0.45))
def test_jitter_inside_the_grid_keeps_the_key(i, j, snap, fx, fy):
    # a station surveyed at a grid node keeps its key under jitter below half a cell
    node = station_keys(np.array([i * snap]), np.array([j * snap]), snap_m=snap)
    jittered = station_keys(np.array([i * snap + fx * snap]), np.array([j * snap + fy * snap]), snap_m=snap)
    assert node[0] == jittered[0]
    x, y = station_key_coordinates(node, snap_m=snap)
    assert (x[0], y[0]) == pytest.approx((i * snap, j * snap))


def test_rounding_boundary_is_deterministic_and_detectable():
    # exactly half a cell rounds up (not numpy's half-to-even): 2.5 -> 3 and 3.5 -> 4
    keys = station_keys(np.array([2.5, 3.5, -2.5]), np.zeros(3), snap_m=1.0)
    x, _ = station_key_coordinates(keys, snap_m=1.0)
    assert x.tolist() == [3.0, 4.0, -2.0]
    # a reading 1 cm either side of an edge flips key: that is what near_snap_boundary reports
    a = station_keys(np.array([2.49, 2.51]), np.zeros(2), snap_m=1.0)
    assert a[0] != a[1]
    flagged = near_snap_boundary(np.array([2.49, 2.51, 3.0, 7.0]), np.array([0.0, 0.0, 0.0, 5.48]),
                                 snap_m=1.0, margin_m=0.05)
    assert flagged.tolist() == [True, True, False, True]


def test_station_keys_reject_non_finite():
    with pytest.raises(GeometryError, match="not finite"):
        station_keys(np.array([1.0, np.nan]), np.array([0.0, 0.0]), snap_m=1.0)


def _survey_traces(seed=3):
    src, rec, s_idx, r_idx = orthogonal_patch(jitter=0.2, seed=seed)
    rng = np.random.default_rng(seed)
    # each trace reads the receiver position with its own small error, as headers do
    rx = rec[r_idx, 0] + rng.uniform(-0.1, 0.1, r_idx.size)
    ry = rec[r_idx, 1] + rng.uniform(-0.1, 0.1, r_idx.size)
    return rx, ry


def test_station_identity_is_independent_of_trace_order_and_swath_order():
    rx, ry = _survey_traces()
    snap = 1.0
    keys = station_keys(rx, ry, snap_m=snap)
    n = keys.size
    half = n // 2
    rng = np.random.default_rng(7)
    perm = rng.permutation(n)

    def table(order_chunks):
        known = np.empty(0, np.int64)
        for chunk in order_chunks:
            _, new = assign_stations(keys[chunk], known)
            known = np.concatenate([known, new])
        return known

    t_ab = table([np.arange(half), np.arange(half, n)])
    t_ba = table([np.arange(half, n), np.arange(half)])
    t_shuffled = table([perm])
    # same set of stations, and each key names the same coordinates, whatever the order
    assert sorted(t_ab) == sorted(t_ba) == sorted(t_shuffled)
    for t in (t_ab, t_ba, t_shuffled):
        x, y = station_key_coordinates(t, snap_m=snap)
        d = dict(zip(t.tolist(), zip(x.tolist(), y.tolist())))
        assert d == dict(zip(t_ab.tolist(), zip(*station_key_coordinates(t_ab, snap_m=snap))))
    # and each trace's station key is the same whichever swath it arrived in
    idx_ab, _ = assign_stations(keys, t_ab)
    idx_ba, _ = assign_stations(keys, t_ba)
    np.testing.assert_array_equal(t_ab[idx_ab], t_ba[idx_ba])


def test_assign_stations_appends_and_never_renumbers():
    rng = np.random.default_rng(11)
    first = rng.integers(0, 50, 300)
    second = rng.integers(30, 90, 300)
    idx1, new1 = assign_stations(first, np.empty(0, np.int64))
    idx2, new2 = assign_stations(second, new1)
    table = np.concatenate([new1, new2])
    # reference: a dictionary filled in trace order
    ref: dict[int, int] = {}
    for k in np.concatenate([first, second]).tolist():
        ref.setdefault(k, len(ref))
    assert table.tolist() == list(ref)
    np.testing.assert_array_equal(table[idx1], first)
    np.testing.assert_array_equal(table[idx2], second)
    again, none_new = assign_stations(first, table)
    np.testing.assert_array_equal(again, idx1)
    assert none_new.size == 0


def test_assign_stations_with_unsorted_table_and_duplicates_rejected():
    known = np.array([40, 10, 30], np.int64)
    idx, new = assign_stations(np.array([30, 99, 40, 5, 99]), known)
    assert idx.tolist() == [2, 3, 0, 4, 3] and new.tolist() == [99, 5]
    with pytest.raises(GeometryError, match="twice"):
        assign_stations(np.array([1]), np.array([3, 3]))


def test_station_keys_from_numbers_two_decimals():
    keys = station_keys_from_numbers(np.array([1001.0, 1001.0, 1001.0]), np.array([2035.0, 2035.5, 2035.0]))
    assert keys[0] == keys[2] != keys[1]
    line, point = station_key_numbers(keys)
    np.testing.assert_allclose(point, [2035.0, 2035.5, 2035.0])


def test_station_means():
    got = station_means(np.array([0, 2, 0, 2]), np.array([1.0, 4.0, 3.0, 6.0]), n_stations=3)
    np.testing.assert_array_equal(got[[0, 2]], [2.0, 5.0])
    assert np.isnan(got[1])


# --- shots --------------------------------------------------------------------


def test_shot_ids_one_source_per_record():
    fr = np.array([7, 7, 8, 8, 9])
    sk = np.array([100, 100, 200, 200, 100])
    shots = shot_ids(fr, sk)
    np.testing.assert_array_equal(shot_field_record(shots), fr)
    assert (shots & ((1 << SHOT_SUB_BITS) - 1)).tolist() == [0] * 5


def test_shot_ids_split_two_source_positions_and_ignore_order():
    fr = np.array([5, 5, 5, 5, 6])
    sk = np.array([300, 100, 300, 100, 100])
    shots = shot_ids(fr, sk)
    assert len(np.unique(shots)) == 3
    assert shots[0] == shots[2] != shots[1] == shots[3]
    perm = np.random.default_rng(0).permutation(5)
    np.testing.assert_array_equal(shot_ids(fr[perm], sk[perm]), shots[perm])
    with pytest.raises(GeometryError, match="more than one source position"):
        shot_ids(fr, sk, on_conflict="error")


# --- layout and summary --------------------------------------------------------


def axial_difference(a, b):
    """Angle between two undirected lines, degrees in [0, 90]."""
    return abs((a - b + 90.0) % 180.0 - 90.0)


@pytest.mark.parametrize("azimuth", [0.0, 30.0, 90.0, 143.0])
def test_station_layout_finds_direction_spacing_and_line_spacing(azimuth):
    src, rec, _, _ = orthogonal_patch(azimuth_deg=azimuth, jitter=0.5, seed=5)
    r = station_layout(rec[:, 0], rec[:, 1])
    assert axial_difference(r["line_azimuth_deg"], azimuth) < 1.0
    assert r["station_spacing_m"] == pytest.approx(25.0, abs=0.6)
    assert r["line_spacing_m"] == pytest.approx(200.0, abs=1.0)
    assert (r["n_lines"], r["n_stations"]) == (4, 96)
    s = station_layout(src[:, 0], src[:, 1])
    assert axial_difference(s["line_azimuth_deg"], azimuth + 90.0) < 1.0
    assert s["station_spacing_m"] == pytest.approx(50.0, abs=1.0)
    assert s["line_spacing_m"] == pytest.approx(300.0, abs=1.0)


def test_station_layout_degenerate_inputs():
    assert np.isnan(station_layout(np.array([1.0]), np.array([2.0]))["station_spacing_m"])
    one_line = station_layout(np.arange(10) * 10.0, np.zeros(10))
    assert one_line["n_lines"] == 1 and np.isnan(one_line["line_spacing_m"])
    assert one_line["line_azimuth_deg"] == pytest.approx(90.0)


def test_acquisition_summary_against_brute_force_fold():
    src, rec, s_idx, r_idx = orthogonal_patch(azimuth_deg=30.0, seed=2)
    sx, sy, rx, ry = src[s_idx, 0], src[s_idx, 1], rec[r_idx, 0], rec[r_idx, 1]
    g = trace_geometry(sx, sy, rx, ry)
    shot = shot_ids(s_idx, station_keys(sx, sy, snap_m=1.0))
    out = acquisition_summary(src[:, 0], src[:, 1], rec[:, 0], rec[:, 1], g["cmp_x"], g["cmp_y"],
                              g["offset"], g["azimuth"], shot)
    assert out["n_shots"] == len(src) and out["n_traces"] == s_idx.size
    assert out["receiver_n_stations"] == len(rec) and out["source_n_stations"] == len(src)
    assert out["offset_min_m"] == pytest.approx(g["offset"].min())
    assert out["offset_max_m"] == pytest.approx(g["offset"].max())
    assert (out["bin_inline_m"], out["bin_crossline_m"]) == pytest.approx((12.5, 25.0))
    # reference fold: a plain loop over traces in the same rotated bin grid
    a = np.radians(out["bin_azimuth_deg"])
    counts: dict[tuple[int, int], int] = {}
    for x, y in zip(g["cmp_x"], g["cmp_y"]):
        px, py = x - out["bin_origin_x"], y - out["bin_origin_y"]
        i = int(np.floor((px * np.sin(a) + py * np.cos(a)) / out["bin_inline_m"]))
        j = int(np.floor((px * np.cos(a) - py * np.sin(a)) / out["bin_crossline_m"]))
        counts[(i, j)] = counts.get((i, j), 0) + 1
    fold = np.array(list(counts.values()))
    assert out["n_bins"] == len(counts)
    assert out["fold_max"] == fold.max()
    assert out["fold_mean"] == pytest.approx(fold.mean())
    assert out["fold_median"] == pytest.approx(np.median(fold))
    assert sum(counts.values()) == s_idx.size


def test_fold_counts_merge_over_chunks():
    rng = np.random.default_rng(4)
    x, y = rng.uniform(0, 1000, (2, 5000))
    kw = dict(bin_m=(25.0, 25.0), azimuth_deg=20.0, origin_x=0.0, origin_y=0.0)
    whole = fold_counts(x, y, **kw)
    parts = [fold_counts(x[a:a + 700], y[a:a + 700], **kw) for a in range(0, 5000, 700)]
    merged = merge_fold_counts(np.concatenate([p[0] for p in parts]), np.concatenate([p[1] for p in parts]))
    np.testing.assert_array_equal(merged[0], whole[0])
    np.testing.assert_array_equal(merged[1], whole[1])


def test_azimuth_coverage_full_and_narrow():
    s = np.zeros(4)
    one = acquisition_summary(s, s, s, s, s, s, np.ones(4), np.array([10.0, 20.0, 30.0, 40.0]), np.arange(4))
    assert one["azimuth_coverage_deg"] == pytest.approx(30.0)
    wrap = acquisition_summary(s, s, s, s, s, s, np.ones(3), np.array([350.0, 0.0, 10.0]), np.arange(3))
    assert wrap["azimuth_coverage_deg"] == pytest.approx(20.0)


def test_geometry_disagreement_sorted_largest_first():
    z = np.zeros(5)
    bx = np.array([0.0, 3.0, 0.0, 10.0, 0.0])
    by = np.array([0.0, 4.0, 0.0, 0.0, np.nan])
    got = geometry_disagreement(z, z, z, z, bx, by, z, z, tolerance_m=1.0)
    assert got["trace"].tolist() == [4, 3, 1]
    assert got["error_m"][1:].tolist() == [10.0, 5.0]
    assert np.isinf(got["error_m"][0])


# --- config -------------------------------------------------------------------


def test_geometry_config_defaults_and_validation():
    cfg = GeometryConfig()
    assert (cfg.snap_m, cfg.station_id_from, cfg.offset_tolerance_m, cfg.sps_revision) == \
        (1.0, "coordinates", 3.0, "2.1")
    assert GeometryConfig(sps_columns={"easting": (47, 56)}).sps_columns["easting"] == (47, 56)
    for bad in ({"snap_m": 0.0}, {"station_id_from": "names"}, {"sps_columns": {"easting": (50, 47)}},
                {"fold_bin_m": (-1.0, 5.0)}, {"unknown": 1}):
        with pytest.raises(ValidationError):
            GeometryConfig(**bad)
    for field in GeometryConfig.model_fields.values():
        assert field.description and field.json_schema_extra["unit"]


def test_relation_runs_expand_back_to_every_trace():
    from descatter.tasks.geometry import relation_runs

    rng = np.random.default_rng(5)
    # two records; record 7 has two receiver lines, one with a reversed point order and a gap
    fr = np.array([7] * 10 + [8] * 4)
    ch = np.array([1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 1, 2, 3, 4])
    line = np.array([101] * 5 + [102] * 5 + [101] * 4, float)
    point = np.array([1001, 1002, 1003, 1004, 1005, 1010, 1009, 1008, 1006, 1005, 1001, 1003, 1005, 1007], float)
    perm = rng.permutation(len(fr))
    runs = relation_runs(fr[perm], ch[perm], line[perm], point[perm])
    # expand: a plain loop over runs is the reference
    got = {}
    for r in range(len(runs["field_record"])):
        a, b = runs["from_channel"][r], runs["to_channel"][r]
        for c in range(a, b + 1):
            t = 0.0 if b == a else (c - a) / (b - a)
            p = runs["from_receiver"][r] + t * (runs["to_receiver"][r] - runs["from_receiver"][r])
            got[(runs["field_record"][r], c)] = (runs["receiver_line"][r], p)
    assert got == {(f, c): (l, p) for f, c, l, p in zip(fr, ch, line, point)}
    assert len(runs["field_record"]) == 5  # 101 | 102 down by 1 | 102 jump | 102 down | record 8
