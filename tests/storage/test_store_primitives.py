"""The survey store's primitives: opening, commit record, done-flags, lock,
atomic writes, run log and the config file."""

from __future__ import annotations

import json
import multiprocessing as mp
import os
import socket
import tomllib

import numpy as np
import pytest
import zarr

from descatter.storage.atomic import sweep_partials, write_json_atomic
from descatter.storage.checkpoints import Checkpoints, clear_swath
from descatter.storage.config_file import config_template, dump_config, load_config, parse_config
from descatter.storage.lock import StoreLock, clear_lock, lock_is_stale, read_lock
from descatter.storage.runlog import RunLog, read_runlog
from descatter.storage.store import SurveyStore, SwathRecord, chunk_bounds, write_header_fields, write_trace_chunk
from descatter.tasks.config import SurveyConfig
from descatter.tasks.errors import (
    ConfigError, InputNotFoundError, LockHeldError, StoreFormatError, SwathConflictError,
)


def _record(name: str, n: int = 10) -> SwathRecord:
    return SwathRecord(
        name=name, file=f"/data/{name}.sgy", size=123, fingerprint="f" * 32, quick_fingerprint="q" * 32,
        n_traces=n, chunk_traces=4, byte_order="big", format_code=5, textual_encoding="ebcdic",
        measurement_system=1, textual=bytes(range(256)) * 12 + b"\x40" * 128, extended_textual=b"",
        binary=b"\x00" * 400, committed_at="2026-01-01T00:00:00",
    )


def test_chunk_bounds_cover_whole_traces():
    assert chunk_bounds(10, 4) == [(0, 4), (4, 8), (8, 10)]
    assert chunk_bounds(8, 4) == [(0, 4), (4, 8)]


def test_create_open_and_refuse_foreign(tmp_path):
    store = SurveyStore.open_or_create(tmp_path / "s.zarr")
    assert SurveyStore.open(store.path).manifest() == []
    # a zarr group that is not ours
    zarr.open_group(str(tmp_path / "other.zarr"), mode="w").attrs["format"] = "something-else"
    with pytest.raises(StoreFormatError, match="not a descatter survey store"):
        SurveyStore.open(tmp_path / "other.zarr")
    # a folder with unrelated files is never written into
    (tmp_path / "junk").mkdir()
    (tmp_path / "junk" / "notes.txt").write_text("x")
    with pytest.raises(StoreFormatError, match="no zarr.json"):
        SurveyStore.open_or_create(tmp_path / "junk")
    assert sorted(p.name for p in (tmp_path / "junk").iterdir()) == ["notes.txt"]
    with pytest.raises(InputNotFoundError):
        SurveyStore.open(tmp_path / "missing.zarr")


def test_newer_format_version_refused(tmp_path):
    store = SurveyStore.open_or_create(tmp_path / "s.zarr")
    store.set_attrs(format_version=99)
    with pytest.raises(StoreFormatError, match="newer"):
        SurveyStore.open(store.path)


def test_manifest_commit_round_trip_and_staging_invisible(tmp_path):
    store = SurveyStore.open_or_create(tmp_path / "s.zarr")
    store.create_swath_arrays("line01", n_traces=10, n_samples=6, chunk_traces=4,
                              header_dtypes={"channel": "int32", "offset": "float64"})
    assert store.swath_names() == []  # staged, not committed
    rng = np.random.default_rng(1)
    for a, b in chunk_bounds(10, 4):
        write_trace_chunk(store.path, "line01", a, rng.standard_normal((b - a, 6)).astype("float32"),
                          np.full((b - a, 240), 7, "uint8"))
    write_header_fields(store, "line01", {"channel": np.arange(10, dtype="int32"), "offset": np.arange(10) * 1.5})
    rec = _record("line01")
    store.commit_swath(rec)
    again = SurveyStore.open(store.path)
    assert again.manifest() == [rec]
    assert again.headers("line01")["offset"][3] == 4.5
    assert again.survey_array().shape == (10, 6)
    with pytest.raises(SwathConflictError, match="already committed"):
        store.commit_swath(rec)
    with pytest.raises(SwathConflictError, match="refusing to delete committed"):
        store.drop_swath_group("line01")


def test_chunk_writes_must_be_whole_chunks(tmp_path):
    store = SurveyStore.open_or_create(tmp_path / "s.zarr")
    store.create_swath_arrays("a", n_traces=10, n_samples=3, chunk_traces=4, header_dtypes={})
    with pytest.raises(ValueError, match="not one chunk"):
        write_trace_chunk(store.path, "a", 2, np.zeros((4, 3), "float32"), np.zeros((4, 240), "uint8"))


def test_checkpoints_are_keyed_by_fingerprint(tmp_path):
    ck = Checkpoints(tmp_path, "ingest", "line01", "fp1")
    assert not ck.is_done(0)
    ck.mark_done(0, {"digest": "ab"})
    ck.mark_done(2)
    assert ck.summary(0) == {"digest": "ab"}
    assert ck.done_chunks() == [0, 2]
    assert not Checkpoints(tmp_path, "ingest", "line01", "fp2").is_done(0)  # other parameters
    pair = Checkpoints(tmp_path, "stats", "line00+line01", "fp1")
    pair.mark_done(1)
    other = Checkpoints(tmp_path, "stats", "line00+line02", "fp1")
    other.mark_done(1)
    assert clear_swath(tmp_path, "line01") == 2  # its own flags and those of a pair naming it
    assert ck.done_chunks() == [] and pair.done_chunks() == [] and other.done_chunks() == [1]


def test_sweep_partials_removes_only_temporaries(tmp_path):
    (tmp_path / "a").mkdir()
    (tmp_path / "a" / "0.abc.partial").write_bytes(b"torn")
    (tmp_path / "a" / "0").write_bytes(b"good")
    removed = sweep_partials(tmp_path)
    assert [p.name for p in removed] == ["0.abc.partial"]
    assert (tmp_path / "a" / "0").read_bytes() == b"good"


def test_atomic_json_replaces_whole(tmp_path):
    write_json_atomic(tmp_path / "m.json", {"a": 1})
    write_json_atomic(tmp_path / "m.json", {"b": 2})
    assert json.loads((tmp_path / "m.json").read_text()) == {"b": 2}
    assert list(tmp_path.iterdir()) == [tmp_path / "m.json"]


def _hold_lock(path, started, release):
    with StoreLock(path, command="test holder"):
        started.set()
        release.wait(30)


def test_lock_names_holder_and_detects_stale(tmp_path):
    ctx = mp.get_context("spawn")
    started, release = ctx.Event(), ctx.Event()
    proc = ctx.Process(target=_hold_lock, args=(tmp_path, started, release))
    proc.start()
    try:
        assert started.wait(30)
        with pytest.raises(LockHeldError, match=f"pid {proc.pid}"):
            StoreLock(tmp_path).acquire()
        with pytest.raises(LockHeldError, match="live writer"):
            clear_lock(tmp_path)
    finally:
        release.set()
        proc.join(30)
    assert read_lock(tmp_path) is None  # released on exit
    # a holder on this host that was killed: stale, and the next writer takes over
    (tmp_path / "lock.json").write_text(json.dumps(
        {"host": socket.gethostname(), "pid": proc.pid, "started": 0, "heartbeat": 0}))
    assert "no longer runs" in lock_is_stale(read_lock(tmp_path))
    with StoreLock(tmp_path):
        assert read_lock(tmp_path)["pid"] == os.getpid()
    # a holder on another host whose heartbeat stopped: reported stale, cleared by hand
    (tmp_path / "lock.json").write_text(json.dumps(
        {"host": "node-17", "pid": 1, "started": 0, "heartbeat": 0}))
    assert "heartbeat" in lock_is_stale(read_lock(tmp_path))
    with pytest.raises(LockHeldError, match="looks stale"):
        StoreLock(tmp_path).acquire()
    clear_lock(tmp_path)
    with StoreLock(tmp_path):
        assert read_lock(tmp_path)["pid"] == os.getpid()


def test_runlog_appends_json_lines(tmp_path):
    log = RunLog(tmp_path, run_id="r1")
    log.write("ingest", "start", traces=10)
    log.write("ingest", "end")
    with open(tmp_path / "runlog.jsonl", "a") as fh:
        fh.write('{"torn": ')  # a killed writer's last line
    records = list(read_runlog(tmp_path))
    assert [(r["stage"], r["event"], r["run"]) for r in records] == [("ingest", "start", "r1"), ("ingest", "end", "r1")]


def test_config_template_lists_every_key_and_round_trips(tmp_path):
    text = config_template()
    doc = tomllib.loads(text)
    assert parse_config(doc) == SurveyConfig()
    for section, model in SurveyConfig.model_fields.items():
        assert section in doc
    for key in SurveyConfig().ingest.headers.model_dump():
        assert f"\n{key} = " in text
    cfg = SurveyConfig.model_validate({"ingest": {"chunk_traces": 500, "headers": {"field_record": 5}}})
    (tmp_path / "c.toml").write_text(dump_config(cfg))
    assert load_config(tmp_path / "c.toml") == cfg


@pytest.mark.parametrize(
    "text, expected",
    [
        ("[ingest]\nchunk_traces = 'many'\n", "ingest.chunk_traces"),
        ("[ingest]\nchunk_trace = 100\n", "ingest.chunk_trace: unknown key"),
        ("[ingest.headers]\nsource_x = 239\n", "ingest.headers.source_x = 239"),
        ("[analysis]\nwindow_start_s = 1.5\nwindow_end_s = 1.0\n", "window_end_s = 1.0 must exceed"),
        ("[analysis]\nvelocity = [[1.0, 2000.0], [0.5, 2500.0]]\n", "t0 values must increase"),
        ("not toml at all = = \n", "not valid TOML"),
    ],
)
def test_bad_config_names_the_key(tmp_path, text, expected):
    path = tmp_path / "bad.toml"
    path.write_text(text)
    with pytest.raises(ConfigError) as info:
        load_config(path)
    assert expected in str(info.value)
    assert str(path) in str(info.value)


def test_missing_config_file(tmp_path):
    with pytest.raises(InputNotFoundError, match="config init"):
        load_config(tmp_path / "nope.toml")


def test_lock_is_reentrant_in_one_process_and_held_until_the_outer_release(tmp_path):
    ctx = mp.get_context("spawn")
    with StoreLock(tmp_path, command="outer"):
        with StoreLock(tmp_path, command="inner"):
            assert read_lock(tmp_path)["command"] == "outer"
        # the inner release leaves the outer hold in place: another process is still refused
        assert read_lock(tmp_path)["command"] == "outer"
        started, release = ctx.Event(), ctx.Event()
        proc = ctx.Process(target=_hold_lock, args=(tmp_path, started, release))
        proc.start()
        try:
            assert not started.wait(3)
        finally:
            release.set()
            proc.join(30)
        assert proc.exitcode != 0  # it raised LockHeldError
    assert read_lock(tmp_path) is None
