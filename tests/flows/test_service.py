"""The service: Prefect flows (one test harness for the session), status, and
runs killed at a deterministic point then resumed."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from descatter.storage.estimation import read_solution
from descatter.storage.runlog import read_runlog
from descatter.storage.store import SurveyStore


@pytest.fixture(scope="module")
def prefect_harness():
    from descatter.flows.service import prefect_environment

    prefect_environment()
    from prefect.testing.utilities import prefect_test_harness

    with prefect_test_harness(server_startup_timeout=120):
        yield


def _lines(survey: Path) -> list[str]:
    return [str(p) for p in sorted(survey.glob("line*.sgy"))]


def test_run_flow_chains_the_stages_and_status_reports_them(prefect_harness, tiny_survey, tmp_path):
    from descatter.flows.service import run_flow
    from descatter.flows.status import stage_status

    store = tmp_path / "s.zarr"
    out = run_flow(str(store), _lines(tiny_survey), str(tiny_survey / "survey.toml"), workers=1)
    assert out["ingest"]["added"] == ["line01", "line02", "line03"]
    assert out["apply"]["traces"] == 2304
    s = SurveyStore.open(store)
    assert s.attrs["current_solution"] == out["estimate"]["solution"]
    rows = {r["stage"]: r for r in stage_status(store)}
    assert rows["ingest"]["done"] == rows["ingest"]["total"] == 2304
    assert rows["apply"]["state"] == "finished" and rows["apply"]["done"] == rows["apply"]["total"] == 3
    # a rerun of the same files does no work twice
    again = run_flow(str(store), _lines(tiny_survey), str(tiny_survey / "survey.toml"), workers=1)
    assert again["ingest"]["skipped"] == ["line01", "line02", "line03"]
    assert again["apply"]["resumed_chunks"] == 3


def _cli(*args: str, env: dict | None = None) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "descatter.flows.cli", *args], capture_output=True, text=True,
                          timeout=600, env={**os.environ, **(env or {})}, start_new_session=True)


@pytest.mark.parametrize("stage, command", [("spectra", "estimate"), ("stats", "estimate"), ("apply", "apply")])
def test_killed_stage_resumes_bit_identical(stage, command, tiny_survey, client, tmp_path_factory):
    from descatter.flows.apply import apply_solution
    from descatter.flows.ingest import ingest_swaths
    from descatter.flows.solve import estimate_survey
    from descatter.storage.config_file import load_config

    base = tmp_path_factory.mktemp(f"killed_{stage}")
    cfg = load_config(tiny_survey / "survey.toml")
    cfg.ingest.chunk_traces = 256  # several chunks a swath, so the kill lands mid-stage
    cfg_path = base / "c.toml"
    from descatter.storage.config_file import dump_config

    cfg_path.write_text(dump_config(cfg))
    reference = base / "ref.zarr"
    ingest_swaths(reference, _lines(tiny_survey), cfg, client=client)
    killed = base / "killed.zarr"
    shutil.copytree(reference, killed)
    estimate_survey(reference, cfg, client=client)
    if command == "apply":
        estimate_survey(killed, cfg, client=client)
        apply_solution(reference, cfg, client=client)
    proc = _cli(command, str(killed), "--config", str(cfg_path), "--workers", "1",
                env={"DESCATTER_FAULT": f"{stage}:2"})
    assert proc.returncode == -9, proc.stderr
    proc = _cli(command, str(killed), "--config", str(cfg_path), "--workers", "1")
    assert proc.returncode == 0, proc.stderr
    _, a, _ = read_solution(SurveyStore.open(reference))
    _, b, _ = read_solution(SurveyStore.open(killed))
    for key in ("receiver_response", "source_response", "receiver_static_ms"):
        assert np.array_equal(a[key], b[key]), key
    if command == "apply":
        for name in SurveyStore.open(reference).swath_names():
            assert np.array_equal(SurveyStore.open(reference).array(name, "corrected")[:],
                                  SurveyStore.open(killed).array(name, "corrected")[:])
    batches = [r for r in read_runlog(killed) if r["stage"] == stage and r["event"] == "batch"]
    if stage != "stats":
        assert any(r.get("resumed") for r in batches)  # finished chunks were not redone
    assert not list(killed.rglob("*.partial"))


def _free_port() -> int:
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_lost_worker_mid_stage_still_gives_identical_results(tiny_survey, client, tmp_path):
    """A real `dask scheduler` and two `dask worker` processes on 127.0.0.1;
    one worker is killed (SIGKILL) while the spectra stage runs."""
    import signal
    import threading
    import time

    from descatter.flows.ingest import ingest_swaths
    from descatter.flows.solve import estimate_survey
    from descatter.storage.config_file import load_config

    cfg = load_config(tiny_survey / "survey.toml")
    cfg.ingest.chunk_traces = 64
    reference, store = tmp_path / "ref.zarr", tmp_path / "s.zarr"
    ingest_swaths(reference, _lines(tiny_survey), cfg, client=client)
    shutil.copytree(reference, store)
    estimate_survey(reference, cfg, client=client)

    port = _free_port()
    procs = [subprocess.Popen([sys.executable, "-m", "distributed.cli.dask_scheduler", "--host", "127.0.0.1",
                               "--port", str(port), "--no-dashboard"],
                              stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True)]
    address = f"tcp://127.0.0.1:{port}"
    try:
        time.sleep(2)
        for _ in range(2):
            procs.append(subprocess.Popen([sys.executable, "-m", "distributed.cli.dask_worker", address,
                                           "--nthreads", "1", "--no-dashboard", "--no-nanny"],
                                          stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                                          start_new_session=True))
        killed = threading.Event()

        def kill_when_started():
            deadline = time.time() + 120
            while time.time() < deadline:
                if any(r["stage"] == "spectra" and r["event"] == "batch" for r in read_runlog(store)):
                    procs[1].send_signal(signal.SIGKILL)
                    killed.set()
                    return
                time.sleep(0.01)

        from descatter.storage.config_file import dump_config

        cfg_path = tmp_path / "c.toml"
        cfg_path.write_text(dump_config(cfg))
        time.sleep(3)  # both workers registered
        watcher = threading.Thread(target=kill_when_started, daemon=True)
        watcher.start()
        # the run is its own process with one client, as a user's would be
        proc = _cli("estimate", str(store), "--config", str(cfg_path), "--cluster", address)
        watcher.join(5)
        assert proc.returncode == 0, proc.stderr
        assert killed.is_set() and procs[1].wait(10) == -signal.SIGKILL
        _, a, _ = read_solution(SurveyStore.open(reference))
        _, b, _ = read_solution(SurveyStore.open(store))
        for key in ("receiver_response", "source_response", "receiver_static_ms"):
            assert np.array_equal(a[key], b[key]), key
    finally:
        for p in procs:
            if p.poll() is None:
                p.kill()
            p.wait(10)
