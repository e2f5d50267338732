"""The service: Prefect flows (one test harness for the session, in
conftest), status, progress artifacts, and runs killed at deterministic
points then resumed."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from collections import Counter
from pathlib import Path

import numpy as np
import pytest

from descatter.storage.estimation import read_solution
from descatter.storage.runlog import read_runlog
from descatter.storage.stations import read_qc_flags, read_stations, read_swath_geometry
from descatter.storage.store import SurveyStore


def _lines(survey: Path) -> list[str]:
    return [str(p) for p in sorted(survey.glob("line*.sgy"))]


def test_run_flow_chains_the_stages_and_status_reports_them(service_run, tiny_survey, tmp_path):
    from descatter.flows.service import run_flow
    from descatter.flows.status import stage_status

    out, store = service_run["result"], service_run["store"]
    assert out["ingest"]["added"] == ["line01", "line02", "line03"]
    assert out["apply"]["traces"] == 2304
    s = SurveyStore.open(store)
    assert s.attrs["current_solution"] == out["estimate"]["solution"]
    rows = {r["stage"]: r for r in stage_status(store)}
    assert rows["ingest"]["done"] == rows["ingest"]["total"] == 2304
    assert rows["apply"]["state"] == "finished" and rows["apply"]["done"] == rows["apply"]["total"] == 3
    # the progress callable saw every part of every stage through to its end
    last = {part: (done, total) for part, done, total in service_run["progress"]}
    assert set(last) == {"line01", "line02", "line03", "spectra", "statistics", "solve", "apply"}
    assert all(done == total for done, total in last.values())
    # a rerun of the same files does no work twice
    again_store = tmp_path / "s.zarr"
    shutil.copytree(store, again_store)
    again = run_flow(str(again_store), _lines(tiny_survey), str(tiny_survey / "survey.toml"), workers=1)
    assert again["ingest"]["skipped"] == ["line01", "line02", "line03"]
    assert again["apply"]["resumed_chunks"] == 3


def test_each_stage_leaves_progress_artifacts_that_reach_100(service_run):
    from prefect.client.orchestration import get_client
    from prefect.client.schemas.filters import ArtifactFilter, ArtifactFilterFlowRunId, ArtifactFilterType

    only_this_run = ArtifactFilter(type=ArtifactFilterType(any_=["progress"]),
                                   flow_run_id=ArtifactFilterFlowRunId(any_=[service_run["flow_run_id"]]))
    with get_client(sync_client=True) as client:
        artifacts = client.read_artifacts(artifact_filter=only_this_run)
    final: dict[str, dict[str, float]] = {}
    for a in artifacts:
        stage, part = a.description.removeprefix("descatter ").split(": ")
        final.setdefault(stage, {})[part.split()[0]] = float(a.data)
    assert final == {
        "ingest": {"line01": 100.0, "line02": 100.0, "line03": 100.0},
        "estimate": {"spectra": 100.0, "statistics": 100.0, "solve": 100.0},
        "apply": {"apply": 100.0},
    }


_READ_ONLY = """
import json, sys
from typer.testing import CliRunner
from descatter.flows.cli import app

runner = CliRunner()
results = []
for args in json.loads(sys.argv[1]):
    res = runner.invoke(app, args)
    results.append([args[0], res.exit_code, res.output[-500:] + repr(res.exception or '')])
print(json.dumps({"results": results, "prefect": sorted(m for m in sys.modules if m.split(".")[0].startswith("prefect"))}))
"""


def test_read_only_commands_never_import_prefect(service_run, tmp_path):
    import json

    from descatter.flows.synth import write_synthetic_survey

    store = tmp_path / "s.zarr"
    shutil.copytree(service_run["store"], store)  # geometry rewrites the store's geometry
    # the session's tiny survey again (same seed), with its SEG SPS files
    with_sps = write_synthetic_survey(tmp_path / "sps", scenario="scatter", size="tiny", seed=3, sps=True)
    s = str(store)
    commands = [["info", s], ["status", s], ["solutions", s], ["stations", s, str(tmp_path / "st.csv")],
                ["stations", s, str(tmp_path / "f.npz"), "--filters"], ["qc", s, str(tmp_path / "qc.csv")],
                ["export", s, str(tmp_path / "out.sgy"), "--array", "corrected"],
                ["report", s, str(tmp_path / "report")], ["geometry", s, "--sps", *map(str, with_sps.sps), "--config", str(with_sps.config)]]
    proc = subprocess.run([sys.executable, "-c", _READ_ONLY, json.dumps(commands)], capture_output=True, text=True,
                          timeout=300)
    assert proc.returncode == 0, proc.stderr
    out = json.loads(proc.stdout.strip().splitlines()[-1])
    assert [r[0] for r in out["results"]] == [c[0] for c in commands]
    assert all(code == 0 for _, code, _ in out["results"]), out["results"]
    assert out["prefect"] == []


def test_a_bad_input_inside_a_flow_gives_the_message_without_a_traceback(prefect_harness, tmp_path):
    proc = _cli(prefect_harness, "ingest", str(tmp_path / "s.zarr"), str(tmp_path / "nothere.sgy"),
                "--cluster", "threads")
    assert proc.returncode == 2
    assert "nothere.sgy: no such SEG-Y file" in proc.stderr and "Traceback" not in proc.stderr


def test_commands_send_heartbeats_only_to_a_lasting_server():
    # Prefect's flow-run heartbeats (PREFECT_FLOWS_HEARTBEAT_FREQUENCY) let a server detect
    # crashed runs; a command run without a server gets a temporary one that ends with it
    from prefect.settings import PREFECT_API_URL, PREFECT_FLOWS_HEARTBEAT_FREQUENCY, temporary_settings

    from descatter.flows.service import local_run

    with temporary_settings(updates={PREFECT_API_URL: None, PREFECT_FLOWS_HEARTBEAT_FREQUENCY: 180}):
        with local_run():
            assert PREFECT_FLOWS_HEARTBEAT_FREQUENCY.value() is None
        assert PREFECT_FLOWS_HEARTBEAT_FREQUENCY.value() == 180
    with temporary_settings(updates={PREFECT_API_URL: "http://127.0.0.1:4200/api",
                                     PREFECT_FLOWS_HEARTBEAT_FREQUENCY: 180}):
        with local_run():
            assert PREFECT_FLOWS_HEARTBEAT_FREQUENCY.value() == 180


# -- runs killed and resumed -------------------------------------------------

def _cli(api_url: str, *args: str, env: dict | None = None) -> subprocess.CompletedProcess:
    """The command line as its own process (and process group, which the
    fault hook kills), reporting to the session's Prefect server."""
    return subprocess.run([sys.executable, "-m", "descatter.flows.cli", *args], capture_output=True, text=True,
                          timeout=600, env={**os.environ, "PREFECT_API_URL": api_url, **(env or {})},
                          start_new_session=True)


@pytest.fixture(scope="module")
def references(tiny_survey, client, tmp_path_factory) -> dict:
    """Uninterrupted runs to compare against, with 256-trace chunks (three a
    swath, so a kill can land mid-stage): the config file and the stores after
    ingest, after estimate and after apply."""
    from descatter.flows.apply import apply_solution
    from descatter.flows.ingest import ingest_swaths
    from descatter.flows.solve import estimate_survey
    from descatter.storage.config_file import dump_config, load_config

    base = tmp_path_factory.mktemp("references")
    cfg = load_config(tiny_survey / "survey.toml")
    cfg.ingest.chunk_traces = 256
    cfg_path = base / "c.toml"
    cfg_path.write_text(dump_config(cfg))
    stores = {stage: base / f"{stage}.zarr" for stage in ("ingest", "estimate", "apply")}
    ingest_swaths(stores["ingest"], _lines(tiny_survey), cfg, client=client)
    shutil.copytree(stores["ingest"], stores["estimate"])
    estimate_survey(stores["estimate"], cfg, client=client)
    shutil.copytree(stores["estimate"], stores["apply"])
    apply_solution(stores["apply"], cfg, client=client)
    return {"config": cfg_path, "files": _lines(tiny_survey), **stores}


def _ingested_arrays(path: Path) -> dict[str, np.ndarray]:
    store = SurveyStore.open(path)
    out = {f"{kind}/{k}": v for kind in ("sources", "receivers") for k, v in read_stations(store, kind).items()}
    for rec in store.manifest():
        out[f"{rec.name}/fingerprint"] = np.array(rec.fingerprint)
        for key in ["traces", "trace_headers"] + [f"headers/{f}" for f in store.header_fields(rec.name)]:
            out[f"{rec.name}/{key}"] = store.array(rec.name, key)[:]
        out |= {f"{rec.name}/geometry/{k}": v for k, v in read_swath_geometry(store, rec.name).items()}
        out[f"{rec.name}/qc_flags"] = read_qc_flags(store, rec.name)
    return out


def _solution_arrays(path: Path) -> dict[str, np.ndarray]:
    return read_solution(SurveyStore.open(path))[1]


def _corrected_arrays(path: Path) -> dict[str, np.ndarray]:
    store = SurveyStore.open(path)
    return {name: store.array(name, "corrected")[:] for name in store.swath_names()}


_RESULTS = {"ingest": _ingested_arrays, "spectra": _solution_arrays, "stats": _solution_arrays,
            "apply": _corrected_arrays}


def _units(records: list[dict], stage: str) -> dict[str, Counter]:
    """Work units of one stage in one run's run-log records: 'done' (computed
    here), 'resumed' (found finished, not redone) and, at ingest, 'committed'
    (swaths skipped whole). A unit is (swath, chunk), or (key, group) for the
    statistics."""
    mine = [r for r in records if r["stage"] == stage]
    if stage == "stats":
        done = Counter((r["key"], r["group"]) for r in mine if r["event"] == "batch")
        resumed = Counter((r["key"], r["group"]) for r in mine if r["event"] == "skip")
    else:
        batches = [r for r in mine if r["event"] == "batch"]
        done = Counter((r.get("swath"), r["chunk"]) for r in batches if not r["resumed"])
        resumed = Counter((r.get("swath"), r["chunk"]) for r in batches if r["resumed"])
    committed = {r["swath"] for r in mine if r["event"] == "skip" and r.get("reason") == "already committed"}
    return {"done": done, "resumed": resumed, "committed": committed}


def _kill_and_resume(stage: str, n: int, references: dict, api_url: str, tmp_path: Path) -> None:
    """Kill the command running ``stage`` after its n-th finished unit,
    rerun it, and check the result against the uninterrupted reference and
    the run log for work done twice."""
    command = {"ingest": "ingest", "spectra": "estimate", "stats": "estimate", "apply": "apply"}[stage]
    store = tmp_path / "killed.zarr"
    if command != "ingest":
        shutil.copytree(references["ingest" if command == "estimate" else "estimate"], store)
    before = len(list(read_runlog(store)))  # records of the reference runs, copied with the store
    args = [command, str(store), *(references["files"] if command == "ingest" else []),
            "--config", str(references["config"]), "--workers", "1"]
    proc = _cli(api_url, *args, env={"DESCATTER_FAULT": f"{stage}:{n}"})
    assert proc.returncode == -9, proc.stderr[-3000:]
    killed = list(read_runlog(store))[before:]
    proc = _cli(api_url, *args)
    assert proc.returncode == 0, proc.stderr[-3000:]
    rerun = list(read_runlog(store))[before + len(killed):]

    want, got = _RESULTS[stage](references[command]), _RESULTS[stage](store)
    assert want.keys() == got.keys()
    for key in want:
        np.testing.assert_array_equal(got[key], want[key], err_msg=key)  # bit for bit (NaNs where the reference has them)

    first, second = _units(killed, stage), _units(rerun, stage)
    assert sum(first["done"].values()) == n  # the hook fires on the n-th unit computed
    assert not first["resumed"]
    # nothing finished before the kill is computed again; all of it is found done
    assert not set(first["done"]) & set(second["done"])
    assert all(unit in second["resumed"] or unit[0] in second["committed"] for unit in first["done"])
    # and the rerun accounts for every unit of the stage exactly once
    reference_units = _units(list(read_runlog(references[command])), stage)["done"]
    seen = second["done"] + second["resumed"]
    assert max(seen.values()) == 1
    assert set(seen) | {u for u in reference_units if u[0] in second["committed"]} == set(reference_units)
    assert not list(store.rglob("*.partial"))


@pytest.mark.parametrize("stage", ["spectra", "stats", "apply"])
def test_killed_stage_resumes_bit_identical(stage, references, prefect_harness, tmp_path):
    _kill_and_resume(stage, 2, references, prefect_harness, tmp_path)


# Chunks a stage of the reference runs: 9 for ingest, spectra and apply (3
# swaths of 3 chunks), 11 statistics jobs (3 groups for each swath and two
# swath pairs that share receivers): kills early, in the middle and at the last but one.
@pytest.mark.slow
@pytest.mark.parametrize("stage, n", [(stage, n) for stage in ("ingest", "spectra", "apply") for n in (1, 4, 8)]
                         + [("stats", n) for n in (1, 5, 10)])
def test_killed_at_many_points_resumes_bit_identical(stage, n, references, prefect_harness, tmp_path):
    _kill_and_resume(stage, n, references, prefect_harness, tmp_path)


def _free_port() -> int:
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_lost_worker_mid_stage_still_gives_identical_results(tiny_survey, client, prefect_harness, tmp_path):
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
        proc = _cli(prefect_harness, "estimate", str(store), "--config", str(cfg_path), "--cluster", address)
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
