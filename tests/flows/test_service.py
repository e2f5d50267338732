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
