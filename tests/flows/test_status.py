"""``descatter status`` from hand-made run-log records: state, done/total,
rate, ETA, resumed work, and the last warnings and errors of a stage's latest run."""

from __future__ import annotations

import json
import time

import pytest

from descatter.flows.status import stage_status, status_text
from descatter.storage.runlog import RUNLOG_NAME
from descatter.storage.store import SurveyStore
from descatter.tasks.errors import InputNotFoundError

T0 = 1_700_000_000.0  # any fixed epoch second


def _rec(run: str, stage: str, event: str, t: float, *, epoch: bool = True, **fields) -> dict:
    """One record as RunLog.write makes it (``epoch=False``: an older record without "t")."""
    record = {"time": time.strftime("%Y-%m-%dT%H:%M:%S%z", time.localtime(t)), "run": run,
              "stage": stage, "event": event, **fields}
    if epoch:
        record["t"] = t
    return record


def _store(tmp_path, records: list[dict]):
    path = tmp_path / "s.zarr"
    SurveyStore.open_or_create(path)
    (path / RUNLOG_NAME).write_text("".join(json.dumps(r) + "\n" for r in records))
    return path


def _row(rows: list[dict], stage: str) -> dict:
    (row,) = [r for r in rows if r["stage"] == stage]
    return row


def test_a_running_stage_gets_rate_and_eta(tmp_path):
    records = [_rec("r1", "apply", "start", T0, chunks=10)]
    records += [_rec("r1", "apply", "batch", T0 + 2 * k) for k in (1, 2, 3, 4)]
    store = _store(tmp_path, records)
    row = _row(stage_status(store), "apply")
    assert row["state"] == "running or interrupted"
    assert (row["done"], row["total"], row["unit"]) == (4, 10, "chunks")
    # hand computed: 4 chunks in 8 s (start to last batch) -> 0.5 chunk/s; 6 chunks left -> 12 s
    assert row["elapsed_s"] == pytest.approx(8.0)
    assert row["rate"] == pytest.approx(0.5)
    assert row["eta_s"] == pytest.approx(12.0)
    text = status_text(store)
    assert "apply     running or interrupted 4/10 chunks  0.5 chunks/s" in text
    assert text.endswith("ETA 12 s")


def test_ingest_counts_traces_of_its_batches(tmp_path):
    store = _store(tmp_path, [
        _rec("r1", "ingest", "start", T0, traces=1000),
        _rec("r1", "ingest", "batch", T0 + 4, traces=200),
        _rec("r1", "ingest", "batch", T0 + 10, traces=300),
    ])
    row = _row(stage_status(store), "ingest")
    assert (row["done"], row["total"], row["unit"]) == (500, 1000, "traces")
    # hand computed: 500 traces in 10 s -> 50 traces/s; 500 left -> 10 s
    assert row["rate"] == pytest.approx(50.0)
    assert row["eta_s"] == pytest.approx(10.0)


def test_a_finished_stage_has_no_eta_and_its_time_runs_to_the_end_record(tmp_path):
    store = _store(tmp_path, [
        _rec("r1", "spectra", "start", T0, chunks=4),
        *[_rec("r1", "spectra", "batch", T0 + k) for k in (1, 2, 3)],
        _rec("r1", "spectra", "end", T0 + 6),
    ])
    row = _row(stage_status(store), "spectra")
    assert row["state"] == "finished"
    assert row["eta_s"] is None
    assert row["elapsed_s"] == pytest.approx(6.0)
    assert row["rate"] == pytest.approx(0.5)  # 3 chunks in 6 s
    assert "ETA" not in status_text(store)


def test_errors_mark_the_stage_failed_and_the_last_three_are_kept(tmp_path):
    store = _store(tmp_path, [
        _rec("old", "ingest", "start", T0 - 100, traces=10),
        _rec("old", "ingest", "warning", T0 - 99, message="old warning"),
        _rec("old", "ingest", "error", T0 - 98, error="old error"),
        _rec("r2", "ingest", "start", T0, traces=10),
        *[_rec("r2", "ingest", "warning", T0 + k, message=f"w{k}") for k in (1, 2, 3, 4)],
        *[_rec("r2", "ingest", "error", T0 + k, error=f"e{k}") for k in (5, 6, 7, 8)],
        _rec("r2", "apply", "error", T0 + 9, error="an error of another stage"),
    ])
    row = _row(stage_status(store), "ingest")
    assert row["run"] == "r2"
    assert row["state"] == "failed"
    assert row["warnings"] == ["w2", "w3", "w4"]
    assert row["errors"] == ["e6", "e7", "e8"]  # neither the older run's nor the other stage's
    assert row["eta_s"] is None  # nothing done: no rate to extrapolate
    lines = status_text(store).splitlines()
    assert lines[0].startswith("ingest    failed")
    assert lines[1:7] == ["    warning: w2", "    warning: w3", "    warning: w4",
                          "    error: e6", "    error: e7", "    error: e8"]


def test_only_the_latest_run_of_a_stage_counts(tmp_path):
    store = _store(tmp_path, [
        _rec("r1", "apply", "start", T0 - 50, chunks=10),
        *[_rec("r1", "apply", "batch", T0 - 50 + k) for k in range(1, 9)],
        _rec("r2", "apply", "start", T0, chunks=10),
        _rec("r2", "apply", "batch", T0 + 5),
        _rec("r1", "apply", "batch", T0 + 6),  # a straggler of the older run
    ])
    row = _row(stage_status(store), "apply")
    assert (row["run"], row["done"], row["total"]) == ("r2", 1, 10)
    assert row["elapsed_s"] == pytest.approx(5.0)


def test_resumed_work_is_counted_from_batches_and_for_stats_from_its_start(tmp_path):
    store = _store(tmp_path, [
        _rec("r1", "spectra", "start", T0, chunks=3),
        _rec("r1", "spectra", "batch", T0 + 1, resumed=True),
        _rec("r1", "spectra", "batch", T0 + 2, resumed=True),
        _rec("r1", "spectra", "batch", T0 + 3),
        _rec("r1", "stats", "start", T0 + 4, jobs=6, resumed=4),
        _rec("r1", "stats", "batch", T0 + 5),
    ])
    rows = stage_status(store)
    assert [r["stage"] for r in rows] == ["spectra", "stats"]
    spectra, stats = rows
    assert spectra["resumed"] == 2
    assert (stats["done"], stats["total"], stats["unit"], stats["resumed"]) == (1, 6, "jobs", 4)
    text = status_text(store)
    assert "3/3 chunks" in text and "(2 resumed)" in text
    assert "1/6 jobs" in text and "(4 resumed)" in text


def test_estimate_counts_one_solve(tmp_path):
    running = _store(tmp_path / "a", [_rec("r1", "estimate", "start", T0)])
    assert (_row(stage_status(running), "estimate")["done"], _row(stage_status(running), "estimate")["total"]) == (0, 1)
    ended = _store(tmp_path / "b", [_rec("r1", "estimate", "start", T0), _rec("r1", "estimate", "end", T0 + 3)])
    row = _row(stage_status(ended), "estimate")
    assert (row["done"], row["total"], row["unit"], row["state"]) == (1, 1, "solve", "finished")


def test_records_without_epoch_seconds_are_timed_from_their_time_text(tmp_path):
    store = _store(tmp_path, [
        _rec("r1", "apply", "start", T0, epoch=False, chunks=4),
        _rec("r1", "apply", "batch", T0 + 10, epoch=False),
    ])
    row = _row(stage_status(store), "apply")
    assert row["elapsed_s"] == pytest.approx(10.0)
    assert row["eta_s"] == pytest.approx(30.0)  # 3 chunks left at 0.1 chunk/s


def test_unknown_total_prints_a_question_mark_and_no_eta(tmp_path):
    store = _store(tmp_path, [_rec("r1", "apply", "start", T0), _rec("r1", "apply", "batch", T0 + 1)])
    row = _row(stage_status(store), "apply")
    assert row["total"] is None and row["eta_s"] is None
    assert "1/? chunks" in status_text(store)


def test_no_run_yet_and_not_a_store(tmp_path):
    store = _store(tmp_path, [])
    assert stage_status(store) == []
    assert status_text(store) == f"{store}: no run recorded yet"
    with pytest.raises(InputNotFoundError):
        stage_status(tmp_path / "nowhere")
