"""Trace QC flags on synthetic chunks with planted faults, exclusions, policies."""

from __future__ import annotations

import numpy as np
import pytest
from pydantic import ValidationError

from descatter.tasks.errors import ConfigError, DescatterError
from descatter.tasks.geometry import station_keys, station_keys_from_numbers
from descatter.tasks.geometry_config import GeometryConfig, QcConfig
from descatter.tasks.trace_qc import (
    FLAG_BITS,
    TraceQcError,
    apply_exclusions,
    clipped_traces,
    duplicate_traces,
    excluded_traces,
    flag_bits,
    flag_counts,
    flag_names,
    join_flags,
    dead_traces,
    nan_traces,
    raise_on_flags,
    sample_flags,
    trace_flags,
)

CLIP_RUN = 4
TOL = 3.0


def clean_chunk(n=24, ns=300, seed=0):
    """Band-limited random traces (no exact ties at the peak) with consistent geometry."""
    rng = np.random.default_rng(seed)
    white = rng.standard_normal((n, ns + 20))
    kernel = np.hanning(21)
    samples = np.stack([np.convolve(w, kernel, mode="valid") for w in white]).astype(np.float32)
    sx = 1000.0 + 50.0 * np.arange(n)
    sy = np.full(n, 2000.0)
    rx = sx + rng.uniform(-800, 800, n)
    ry = sy + rng.uniform(-800, 800, n)
    offset = np.round(np.hypot(rx - sx, ry - sy))  # headers hold whole metres
    return samples, dict(source_x=sx, source_y=sy, receiver_x=rx, receiver_y=ry, offset=offset)


def flags_of(samples, h, **kw):
    # station_keys refuses non-finite positions; such traces are zero_xy anyway
    sk = station_keys(np.nan_to_num(h["source_x"]), np.nan_to_num(h["source_y"]), snap_m=1.0)
    rk = station_keys(np.nan_to_num(h["receiver_x"]), np.nan_to_num(h["receiver_y"]), snap_m=1.0)
    return trace_flags(samples, offset_tolerance_m=TOL, clip_run=CLIP_RUN, source_key=sk, receiver_key=rk, **h, **kw)


def test_clean_chunk_has_no_flags():
    samples, h = clean_chunk()
    mask = flags_of(samples, h)
    assert mask.dtype == np.uint16 and not mask.any()


def test_each_planted_fault_sets_exactly_its_own_flag():
    samples, h = clean_chunk()
    expect = np.zeros(len(samples), dtype=np.uint16)

    def plant(i, name):
        expect[i] = FLAG_BITS[name]

    samples[2] = 0.0
    plant(2, "dead")
    samples[4, 17] = np.nan
    plant(4, "nan")
    samples[5, 0] = np.inf
    plant(5, "nan")
    for k in ("source_x", "source_y", "receiver_x", "receiver_y"):
        h[k][9] = h[k][8]  # same station pair as trace 8: the later one is the duplicate
    h["offset"][9] = h["offset"][8]
    plant(9, "duplicate")
    h["source_x"][11], h["source_y"][11] = 0.0, 0.0  # header offset now disagrees too; zero_xy wins
    plant(11, "zero_xy")
    h["receiver_x"][12] = np.nan
    plant(12, "zero_xy")
    h["offset"][13] += 25.0
    plant(13, "offset_mismatch")
    h["offset"][14] = -h["offset"][14]  # sign of a header offset is ignored: no flag
    peak = np.abs(samples[15]).max() * 1.5
    samples[15, 100:100 + CLIP_RUN] = -peak
    plant(15, "clipped")
    samples[16, 50:50 + CLIP_RUN - 1] = np.abs(samples[16]).max() * 2  # one sample short of a clip
    h["offset"][18] += TOL * 0.9  # inside the tolerance
    mask = flags_of(samples, h)
    assert [join_flags(m) for m in mask] == [join_flags(m) for m in expect]
    np.testing.assert_array_equal(mask, expect)


def test_clipped_against_a_loop_reference():
    rng = np.random.default_rng(9)
    s = rng.integers(-3, 4, (200, 40)).astype(np.float32)  # coarse values: many plateaus
    s[:5] = 0.0
    s[5, 3] = np.nan

    def reference(trace, k):
        if not np.isfinite(trace).all():
            return False
        a = np.abs(trace)
        p = a.max()
        run = best = 0
        for v in a:
            run = run + 1 if v == p else 0
            best = max(best, run)
        return p > 0 and best >= k

    for k in (2, 3, 5):
        expected = [reference(t, k) for t in s]
        assert clipped_traces(s, clip_run=k).tolist() == expected
    with pytest.raises(ValueError, match="clip_run"):
        clipped_traces(s, clip_run=1)


def test_blocked_sample_flags_equal_the_three_whole_chunk_tests():
    """The one-sweep, cache-blocked ``sample_flags`` against the separate
    dead / nan / clipped definitions, on coarse values (many plateaus, so
    many grid candidates), planted NaN/Inf, negative peaks, and block sizes
    that cut the traces into uneven blocks."""
    rng = np.random.default_rng(17)
    s = rng.integers(-3, 4, (301, 41)).astype(np.float32)
    s[:7] = 0.0
    s[8, 3], s[9, 40], s[10, 0] = np.nan, np.inf, -np.inf
    s[11, 10:20] = -9.0  # run at the negative peak
    s[12] = 2.0  # a constant trace is one long run at its peak
    s[13, 0:3] = 7.0  # a short run at the very start
    for k in (2, 3, 4, 5, 8):
        expected = (dead_traces(s) * FLAG_BITS["dead"] | nan_traces(s) * FLAG_BITS["nan"]
                    | clipped_traces(s, clip_run=k) * FLAG_BITS["clipped"]).astype(np.uint16)
        for rows in (1, 7, 128, 1000):
            assert np.array_equal(sample_flags(s, clip_run=k, rows=rows), expected), (k, rows)
    assert sample_flags(s[:, :3], clip_run=4)[11] == 0  # shorter than one run: never clipped
    assert (sample_flags(np.zeros((3, 0), np.float32), clip_run=4) == FLAG_BITS["dead"]).all()
    with pytest.raises(ValueError, match="clip_run"):
        sample_flags(s, clip_run=1)


def test_duplicates_across_chunks_need_whole_swath_keys():
    sk = np.array([1, 2, 3, 1, 5, 1])
    rk = np.array([7, 7, 7, 7, 7, 8])
    whole = duplicate_traces(sk, rk)
    assert whole.tolist() == [False, False, False, True, False, False]
    # chunk-local search misses the repeat that straddles the boundary between traces 2 and 3
    local = np.concatenate([duplicate_traces(sk[:3], rk[:3]), duplicate_traces(sk[3:], rk[3:])])
    assert not local.any()
    samples = np.ones((3, 10), np.float32) * np.arange(10, dtype=np.float32)
    h = dict(source_x=np.ones(3), source_y=np.ones(3), receiver_x=np.full(3, 2.0), receiver_y=np.ones(3),
             offset=np.ones(3))
    mask = trace_flags(samples, offset_tolerance_m=TOL, clip_run=CLIP_RUN, duplicate=whole[3:], **h)
    assert [flag_names(m) for m in mask] == [["duplicate"], [], []]


def test_flag_names_order_and_bits():
    bits = list(FLAG_BITS.values())
    assert len(set(bits)) == len(bits) and all(b & (b - 1) == 0 and b < 2**16 for b in bits)
    assert list(FLAG_BITS) == ["dead", "nan", "duplicate", "zero_xy", "offset_mismatch", "clipped", "excluded"]
    m = FLAG_BITS["excluded"] | FLAG_BITS["nan"] | FLAG_BITS["clipped"]
    assert flag_names(m) == ["nan", "clipped", "excluded"]
    assert join_flags(np.uint16(m)) == "nan|clipped|excluded"
    assert join_flags(0) == ""
    assert flag_bits(["nan", "dead"]) == 3
    with pytest.raises(ValueError, match="unknown QC flag"):
        flag_bits(["bogus"])
    assert flag_counts(np.array([m, 0, FLAG_BITS["nan"]], np.uint16))["nan"] == 2


def test_exclusions_by_station_field_record_and_trace_range():
    n = 12
    mask = np.zeros(n, np.uint16)
    mask[0] = FLAG_BITS["dead"]
    src = np.arange(n) % 4
    rec = 100 + np.arange(n) % 3
    fr = 1000 + np.arange(n) // 2
    index = 500 + np.arange(n)  # this chunk starts at swath position 500
    out = apply_exclusions(mask, source_key=src, receiver_key=rec, field_record=fr, trace_index=index,
                           exclude_sources=[3], exclude_receivers=[101], exclude_field_records=[1005],
                           exclude_ranges=[(502, 504), (503, 505)])
    # reference: each rule written out as a loop
    expected = [(s == 3) or (r == 101) or (f == 1005) or (502 <= t < 505)
                for s, r, f, t in zip(src, rec, fr, index)]
    assert ((out & FLAG_BITS["excluded"]) != 0).tolist() == expected
    assert out[0] & FLAG_BITS["dead"] and not mask[0] & FLAG_BITS["excluded"]  # input untouched
    with pytest.raises(ValueError, match="trace_index"):
        apply_exclusions(mask, exclude_ranges=[(0, 1)])


def test_excluded_traces_and_error_policy():
    m = np.array([0, FLAG_BITS["dead"], FLAG_BITS["clipped"], FLAG_BITS["excluded"]], np.uint16)
    qc = QcConfig()
    assert excluded_traces(m, exclude_bits=qc.exclude_bits()).tolist() == [False, True, False, True]
    raise_on_flags(m, error_bits=qc.error_bits())  # no policy is 'error' by default
    strict = QcConfig(clipped="error")
    with pytest.raises(TraceQcError, match=r"trace \[702\]") as err:
        raise_on_flags(m, error_bits=strict.error_bits(), trace_index=np.arange(700, 704))
    assert isinstance(err.value, DescatterError) and isinstance(err.value, ValueError)


def test_qc_config_defaults_ranges_and_station_refs():
    qc = QcConfig()
    assert (qc.dead, qc.nan, qc.duplicate, qc.zero_xy, qc.offset_mismatch, qc.clipped) == \
        ("exclude", "exclude", "keep", "exclude", "keep", "keep")
    assert qc.clip_run == 4
    assert qc.exclude_bits() == flag_bits(["dead", "nan", "zero_xy", "excluded"])
    qc = QcConfig(exclude_traces=[{"swath": "a", "start": 0, "stop": 10}, {"swath": "b", "start": 5, "stop": 6}],
                  exclude_sources=[{"x": 1000.2, "y": 2000.4}, {"key": 42}],
                  exclude_receivers=[{"line": 1001, "point": 2035.5}])
    assert qc.trace_ranges("b").tolist() == [[5, 6]] and qc.trace_ranges("c").shape == (0, 2)
    geo = GeometryConfig()
    keys = qc.source_keys(geo)
    assert keys[0] == station_keys(np.array([1000.0]), np.array([2000.0]), snap_m=1.0)[0] and keys[1] == 42
    with pytest.raises(ConfigError, match="line/point"):
        qc.receiver_keys(geo)
    numbers = GeometryConfig(station_id_from="station_numbers")
    assert qc.receiver_keys(numbers)[0] == station_keys_from_numbers(np.array([1001.0]), np.array([2035.5]))[0]
    with pytest.raises(ConfigError, match="x/y"):
        qc.source_keys(numbers)
    for bad in ({"dead": "drop"}, {"clip_run": 1}, {"exclude_traces": [{"swath": "a", "start": 5, "stop": 5}]},
                {"exclude_sources": [{"line": 1.0}]}, {"exclude_sources": [{"key": 1, "x": 0.0, "y": 0.0}]},
                {"extra": True}):
        with pytest.raises(ValidationError):
            QcConfig(**bad)
    for field in QcConfig.model_fields.values():
        assert field.description and field.json_schema_extra["unit"]


def test_usable_traces_needs_both_stations_and_no_excluded_flag():
    from descatter.tasks.trace_qc import usable_traces

    flags = np.array([0, FLAG_BITS["dead"], FLAG_BITS["clipped"], 0, 0], np.uint16)
    src = np.array([0, 1, 2, -1, 4])
    rcv = np.array([0, 1, 2, 3, -1])
    got = usable_traces(flags, src, rcv, exclude_bits=FLAG_BITS["dead"] | FLAG_BITS["excluded"])
    assert got.tolist() == [True, False, True, False, False]
