"""The split of a swath's commit work at ingest: header decoding, geometry and
QC on a worker task per swath, station appends and the manifest on the
driver. Checked against the geometry kernel run swath after swath in one
process, the way the station tables are defined (each swath looked up in the
whole table as committed before it)."""

from __future__ import annotations

import shutil
import struct
from pathlib import Path

import numpy as np
import pytest
import zarr

import descatter.flows.ingest as ingest_mod
from descatter.flows.ingest import ingest_swaths
from descatter.flows.sps_geometry import SAMPLE_BITS
from descatter.flows.status import stage_status
from descatter.storage.config_file import load_config
from descatter.storage.runlog import read_runlog
from descatter.storage.stations import (
    KINDS, STATION_FIELDS, read_qc_flags, read_stations, read_swath_geometry,
)
from descatter.storage.store import SurveyStore, write_whole_arrays
from descatter.tasks.errors import TraceQcError
from descatter.tasks.swath_geometry import swath_geometry
from descatter.tasks.trace_qc import FLAG_BITS


def _lines(survey: Path) -> list[Path]:
    return sorted(survey.glob("line*.sgy"))


def _cfg(survey: Path):
    cfg = load_config(survey / "survey.toml")
    cfg.ingest.chunk_traces = 256  # three chunks a swath
    return cfg


def _geometry_state(path: Path) -> dict[str, np.ndarray]:
    """Station tables, manifest counts, per-swath geometry, QC flags and
    decoded headers of a store, keyed by name."""
    store = SurveyStore.open(path)
    out = {f"{k}/{f}": v for k in KINDS for f, v in read_stations(store, k).items()}
    out["counts"] = np.array([store.station_counts()[k] for k in KINDS])
    for rec in store.manifest():
        out |= {f"{rec.name}/geometry/{f}": v for f, v in read_swath_geometry(store, rec.name).items()}
        out[f"{rec.name}/qc_flags"] = read_qc_flags(store, rec.name)
        out |= {f"{rec.name}/headers/{f}": v for f, v in store.headers(rec.name).items()}
        out[f"{rec.name}/fingerprint"] = np.array(rec.fingerprint)
    return out


def _assert_same(a: dict[str, np.ndarray], b: dict[str, np.ndarray]) -> None:
    assert a.keys() == b.keys()
    for key in a:
        assert a[key].dtype == b[key].dtype, key
        np.testing.assert_array_equal(a[key], b[key], err_msg=key)


def _sequential_reference(path: Path, cfg) -> tuple[dict, dict]:
    """What each swath's geometry and the tables must be: the kernel run on
    the stored headers swath after swath, each against every station of the
    swaths before it (tasks.swath_geometry's definition of the tables)."""
    store = SurveyStore.open(path)
    known = {k: np.zeros(0, np.int64) for k in KINDS}
    tables = {k: {f: [] for f in STATION_FIELDS} for k in KINDS}
    swaths = {}
    for rec in store.manifest():
        flags = read_qc_flags(store, rec.name) & np.uint16(SAMPLE_BITS)
        g = swath_geometry(rec.name, store.headers(rec.name), flags, cfg,
                           known_sources=known["sources"], known_receivers=known["receivers"])
        swaths[rec.name] = (g.arrays, g.flags)
        for kind, rows in (("sources", g.new_sources), ("receivers", g.new_receivers)):
            known[kind] = np.concatenate([known[kind], rows["key"]])
            for f in STATION_FIELDS:
                tables[kind][f].append(rows[f])
    return swaths, {k: {f: np.concatenate(v) for f, v in t.items()} for k, t in tables.items()}


@pytest.fixture(scope="module")
def together(tiny_survey, client, tmp_path_factory) -> Path:
    path = tmp_path_factory.mktemp("together") / "s.zarr"
    ingest_swaths(path, _lines(tiny_survey), _cfg(tiny_survey), client=client)
    return path


def test_one_call_matches_the_swath_by_swath_definition(together, tiny_survey):
    cfg = _cfg(tiny_survey)
    swaths, tables = _sequential_reference(together, cfg)
    store = SurveyStore.open(together)
    assert [r.name for r in store.manifest()] == [p.stem for p in _lines(tiny_survey)]
    for name, (arrays, flags) in swaths.items():
        stored = read_swath_geometry(store, name)
        for f, v in arrays.items():
            np.testing.assert_array_equal(stored[f], v, err_msg=f"{name}/{f}")
        np.testing.assert_array_equal(read_qc_flags(store, name), flags)
    for kind in KINDS:
        got = read_stations(store, kind)
        assert store.station_counts()[kind] == len(tables[kind]["key"]) > 0
        for f in STATION_FIELDS:
            np.testing.assert_array_equal(got[f], tables[kind][f], err_msg=f"{kind}/{f}")


def _watch_renumbering(monkeypatch) -> list[tuple[str, str, int, np.ndarray]]:
    moved = []
    real = ingest_mod.renumber_stations

    def spy(store, swath, field, *, first, index):
        moved.append((swath, field, first, np.asarray(index)))
        real(store, swath, field, first=first, index=index)

    monkeypatch.setattr(ingest_mod, "renumber_stations", spy)
    return moved


def test_later_swaths_of_one_call_are_repointed(together, tiny_survey, client, tmp_path, monkeypatch):
    """In one call every swath is built against the tables as they were when
    the call began (empty here): the sources of each later swath, all new,
    are moved past those of the swaths before it."""
    moved = _watch_renumbering(monkeypatch)
    again = tmp_path / "again.zarr"
    ingest_swaths(again, _lines(tiny_survey), _cfg(tiny_survey), client=client)
    names = [p.stem for p in _lines(tiny_survey)]
    sources = {swath: index for swath, field, _, index in moved if field == "source_index"}
    assert list(sources) == names[1:]
    store = SurveyStore.open(again)
    seen = set()
    for name in names:
        if name in sources:  # a shift past every source of the swaths before
            assert sources[name][0] == len(seen) > 0 and (np.diff(sources[name]) == 1).all()
        seen |= set(read_swath_geometry(store, name, ["source_index"])["source_index"].tolist())
    assert all(first == 0 for _, _, first, _ in moved)
    _assert_same(_geometry_state(again), _geometry_state(together))


def _reversed_traces(src: Path, dst: Path) -> None:
    raw = src.read_bytes()
    ns = struct.unpack(">H", raw[3220:3222])[0]  # SEG-Y rev 1 binary header: samples per trace
    tb = 240 + 4 * ns
    n = (len(raw) - 3600) // tb
    dst.write_bytes(raw[:3600] + b"".join(raw[3600 + i * tb: 3600 + (i + 1) * tb] for i in reversed(range(n))))


def test_stations_met_again_in_another_order_keep_their_rows(tiny_survey, client, tmp_path, monkeypatch):
    """line02 with its traces reversed meets line01's receivers in another
    order: its task numbered them as new, the driver points them back at
    line01's rows (a permutation, not a shift) and appends none of them."""
    lines = _lines(tiny_survey)
    flipped = tmp_path / "line02r.sgy"
    _reversed_traces(lines[1], flipped)
    cfg = _cfg(tiny_survey)
    moved = _watch_renumbering(monkeypatch)
    store_path = tmp_path / "s.zarr"
    ingest_swaths(store_path, [lines[0], flipped], cfg, client=client)
    receivers = [index for swath, field, _, index in moved if swath == "line02r" and field == "receiver_index"]
    assert len(receivers) == 1 and not (np.diff(receivers[0]) == 1).all()
    swaths, tables = _sequential_reference(store_path, cfg)
    store = SurveyStore.open(store_path)
    for kind in KINDS:
        for f in STATION_FIELDS:
            np.testing.assert_array_equal(read_stations(store, kind)[f], tables[kind][f], err_msg=f"{kind}/{f}")
    for name, (arrays, _) in swaths.items():
        for f, v in arrays.items():
            np.testing.assert_array_equal(read_swath_geometry(store, name, [f])[f], v, err_msg=f"{name}/{f}")


def test_incremental_calls_give_the_same_store(together, tiny_survey, client, tmp_path):
    cfg = _cfg(tiny_survey)
    lines = _lines(tiny_survey)
    one_by_one = tmp_path / "one.zarr"
    for line in lines:
        ingest_swaths(one_by_one, [line], cfg, client=client)
    _assert_same(_geometry_state(one_by_one), _geometry_state(together))
    # a second call that starts from a non-empty table and adds two swaths
    split = tmp_path / "split.zarr"
    ingest_swaths(split, lines[:1], cfg, client=client)
    ingest_swaths(split, lines[1:], cfg, client=client)
    _assert_same(_geometry_state(split), _geometry_state(together))


def test_sps_geometry_on_the_workers_matches_swath_by_swath(client, tmp_path):
    from descatter.flows.sps_geometry import apply_sps_geometry
    from descatter.flows.synth import write_synthetic_survey

    survey = tmp_path / "sps_survey"
    write_synthetic_survey(survey, scenario="statics", size="tiny", seed=4, sps=True)
    cfg = _cfg(survey)
    cfg.geometry.station_id_from = "station_numbers"  # keys from the SPS line and point numbers
    lines = _lines(survey)
    first = tmp_path / "first.zarr"
    ingest_swaths(first, lines[:1], _cfg(survey), client=client)
    apply_sps_geometry(first, [survey / "survey.s", survey / "survey.r", survey / "survey.x"], cfg)
    both = tmp_path / "both.zarr"
    shutil.copytree(first, both)
    ingest_swaths(both, lines[1:], cfg, client=client)  # one call: built on the workers, re-pointed
    each = tmp_path / "each.zarr"
    shutil.copytree(first, each)
    for line in lines[1:]:
        ingest_swaths(each, [line], cfg, client=client)
    _assert_same(_geometry_state(both), _geometry_state(each))
    # and both equal the geometry 'descatter geometry --sps' rebuilds in one process
    apply_sps_geometry(each, [survey / "survey.s", survey / "survey.r", survey / "survey.x"], cfg)
    rebuilt, got = _geometry_state(each), _geometry_state(both)
    for key in rebuilt:
        if "/geometry/" in key or key.split("/")[0] in KINDS or key == "counts":
            np.testing.assert_array_equal(got[key], rebuilt[key], err_msg=key)


def test_geometry_tasks_reach_the_run_log_as_task_records(together, tiny_survey):
    records = [r for r in read_runlog(together) if r["stage"] == "ingest"]
    tasks = [r for r in records if r["event"] == "task"]
    assert [r["swath"] for r in tasks] and sorted(r["swath"] for r in tasks) == [p.stem for p in _lines(tiny_survey)]
    assert all(r["task"] == "geometry" and r["seconds"] > 0 for r in tasks)
    # not batches: the traces done count only the chunks
    status = next(r for r in stage_status(together) if r["stage"] == "ingest")
    assert status["done"] == status["total"] == sum(r.n_traces for r in SurveyStore.open(together).manifest())


def _with_nan_trace(src: Path, dst: Path, trace: int) -> None:
    raw = bytearray(src.read_bytes())
    ns = struct.unpack(">H", raw[3220:3222])[0]  # SEG-Y rev 1 binary header: samples per trace
    at = 3600 + trace * (240 + 4 * ns) + 240 + 4 * 7
    raw[at:at + 4] = struct.pack(">f", float("nan"))
    dst.write_bytes(bytes(raw))


def test_refused_later_swath_leaves_the_earlier_ones_as_alone(tiny_survey, client, tmp_path):
    lines = _lines(tiny_survey)
    bad = tmp_path / "line09.sgy"
    _with_nan_trace(lines[1], bad, 12)
    cfg = _cfg(tiny_survey)
    cfg.qc.nan = "error"
    store_path = tmp_path / "s.zarr"
    with pytest.raises(TraceQcError, match=r"line09.*trace \[12\]"):
        ingest_swaths(store_path, [lines[0], bad], cfg, client=client)
    alone = tmp_path / "alone.zarr"
    ingest_swaths(alone, [lines[0]], cfg, client=client)
    _assert_same(_geometry_state(store_path), _geometry_state(alone))
    assert not (store_path / "swaths" / "line09").exists()


def test_interrupted_before_commit_rebuilds_from_the_sample_flags(tiny_survey, client, tmp_path, monkeypatch):
    """Killed between a swath's geometry task and its commit: the rerun finds
    every chunk done and redoes only the geometry, whose QC must start from
    the chunks' sample flags, not from the flags the first run wrote."""
    lines = _lines(tiny_survey)[:1]
    excluding = _cfg(tiny_survey)
    raw = lines[0].read_bytes()
    record = struct.unpack(">i", raw[3600 + 8: 3600 + 12])[0]  # SEG-Y rev 1: field record, bytes 9-12
    excluding.qc.exclude_field_records = [record]
    store_path = tmp_path / "s.zarr"

    def interrupted(*args, **kwargs):
        raise RuntimeError("interrupted")  # not a refusal: the staging is kept for the rerun

    monkeypatch.setattr(ingest_mod, "_commit", interrupted)
    with pytest.raises(RuntimeError, match="interrupted"):
        ingest_swaths(store_path, lines, excluding, client=client)
    staged = zarr.open_array(str(store_path), path=f"swaths/{lines[0].stem}/qc_flags", mode="r")[:]
    assert (staged & FLAG_BITS["excluded"]).any()  # the first run's geometry task wrote its flags
    monkeypatch.undo()
    plain = _cfg(tiny_survey)  # the exclusion dropped: not part of the chunks' fingerprint
    report = ingest_swaths(store_path, lines, plain, client=client)
    assert report.written_chunks == 0 and report.resumed_chunks == 3
    fresh = tmp_path / "fresh.zarr"
    ingest_swaths(fresh, lines, plain, client=client)
    _assert_same(_geometry_state(store_path), _geometry_state(fresh))
    assert not (read_qc_flags(SurveyStore.open(store_path), lines[0].stem) & FLAG_BITS["excluded"]).any()


def test_whole_arrays_equal_zarr_create_array(tmp_path):
    """write_whole_arrays against zarr's own create_array + write, byte for
    byte: the same metadata document and chunk files."""
    from zarr.codecs import BloscCodec

    codec = (BloscCodec(cname="zstd", clevel=3, shuffle="shuffle"),)
    rng = np.random.default_rng(7)
    values = {"a": rng.integers(-5, 5, 1000), "b": rng.standard_normal(1000), "c": rng.integers(0, 9, 1000),
              "d": rng.standard_normal(1000)}
    dtypes = {"a": "int32", "b": "float64", "c": "int32", "d": "float64"}
    ours = zarr.open_group(str(tmp_path / "ours.zarr"), mode="w").require_group("g")
    theirs = zarr.open_group(str(tmp_path / "theirs.zarr"), mode="w").require_group("g")
    ours.create_array("c", shape=(3,), chunks=(3,), dtype="int8", fill_value=1)  # replaced, as overwrite=True does
    ours["c"][:] = [1, 2, 3]
    write_whole_arrays(ours, values, dtypes=dtypes, chunks=400, compressors=codec)
    for name, v in values.items():
        theirs.create_array(name, shape=(1000,), chunks=(400,), dtype=dtypes[name], compressors=codec,
                            fill_value=0, overwrite=True, dimension_names=["trace"])[:] = v.astype(dtypes[name])

    def files(root: Path) -> dict[str, bytes]:
        return {str(p.relative_to(root)): p.read_bytes() for p in sorted(root.rglob("*")) if p.is_file()}

    assert files(tmp_path / "ours.zarr") == files(tmp_path / "theirs.zarr")


def _slow_write(path: str, seconds: float) -> str:
    import time as _time

    _time.sleep(seconds)
    with open(path, "w") as f:
        f.write("done")
    return path


def test_refusal_waits_for_cancelled_tasks_that_still_run(client, tmp_path):
    """A cancelled task that a worker is executing runs to its end: the ingest
    waits for it before deleting the staging it writes into."""
    import time as _time

    from descatter.flows.ingest import wait_for_running

    marker = tmp_path / "written"
    fut = client.submit(_slow_write, str(marker), 1.0, pure=False)
    deadline = _time.monotonic() + 30
    while not any(fut.key in ks for ks in client.processing().values()) and _time.monotonic() < deadline:
        _time.sleep(0.02)
    fut.cancel()
    assert not marker.exists()  # still running
    assert not wait_for_running(client, {fut.key}, timeout_s=0.05)  # a wait that ends first says so
    assert wait_for_running(client, {fut.key})
    assert marker.read_text() == "done"  # the wait lasted until the task had written
    assert wait_for_running(client, {"no-such-key"})  # nothing of ours running: returns at once
