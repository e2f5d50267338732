"""The command line, in process (typer's CliRunner) and as a subprocess."""

from __future__ import annotations

import os
import subprocess
import sys
import tomllib

import numpy as np
import pytest
import segyio
from typer.testing import CliRunner

from descatter.flows.cli import app
from descatter.flows.ingest import ingest_swaths
from descatter.storage.config_file import load_config
from descatter.storage.store import SurveyStore
from descatter.tasks.errors import DescatterError

runner = CliRunner()


def _run(*args: str):
    return runner.invoke(app, list(args), catch_exceptions=False)


def test_config_init_and_check(tmp_path):
    path = tmp_path / "survey.toml"
    res = _run("config", "init", str(path))
    assert res.exit_code == 0 and path.is_file()
    doc = tomllib.loads(path.read_text())
    assert doc["ingest"]["headers"]["source_x"] == 73  # SEG-Y rev 1: source X at byte 73
    res = _run("config", "check", str(path))
    assert res.exit_code == 0 and "[ingest.headers]" in res.stdout
    with pytest.raises(DescatterError, match="--force"):  # refuses to overwrite without --force
        _run("config", "init", str(path))


def test_bad_config_gives_a_message_naming_the_key(tmp_path):
    path = tmp_path / "bad.toml"
    path.write_text("[qc]\ndead = 'drop'\n")
    proc = subprocess.run([sys.executable, "-m", "descatter.flows.cli", "config", "check", str(path)],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2
    assert "qc.dead" in proc.stderr and "Traceback" not in proc.stderr


def test_read_only_commands(tiny_survey, client, tmp_path):
    store = tmp_path / "s.zarr"
    ingest_swaths(store, sorted(tiny_survey.glob("line*.sgy")), load_config(tiny_survey / "survey.toml"),
                  client=client)
    res = _run("info", str(store))
    assert res.exit_code == 0
    assert "traces    2304" in res.stdout and "96 receivers" in res.stdout and "warnings  none" in res.stdout
    res = _run("qc", str(store), str(tmp_path / "qc.csv"))
    assert res.exit_code == 0 and (tmp_path / "qc.csv").read_text().startswith("swath,trace,field_record")
    res = _run("export", str(store), str(tmp_path / "out.sgy"), "--format", "ibm")
    assert res.exit_code == 0
    with segyio.open(str(tmp_path / "out.sgy"), ignore_geometry=True) as f:
        assert f.tracecount == 2304
    res = _run("lock", str(store))
    assert "not locked" in res.stdout
    res = _run("config", "check", str(tiny_survey / "survey.toml"), "--store", str(store))
    assert res.exit_code == 0


def test_demo_runs_every_stage_on_a_tiny_survey(prefect_harness, tmp_path):
    proc = subprocess.run([sys.executable, "-m", "descatter.flows.cli", "demo", str(tmp_path / "d"),
                           "--size", "tiny", "--workers", "1"], capture_output=True, text=True, timeout=300,
                          env={**os.environ, "PREFECT_API_URL": prefect_harness})
    assert proc.returncode == 0, proc.stderr
    # ingest, estimate and apply ran as the service's flows, reported to the session's server
    from prefect.client.orchestration import get_client
    from prefect.client.schemas.filters import FlowFilter, FlowFilterName

    names = ["descatter-ingest", "descatter-estimate", "descatter-apply"]
    with get_client(sync_client=True) as client:
        runs = client.read_flow_runs(flow_filter=FlowFilter(name=FlowFilterName(any_=names)))
        flows = {f.id: f.name for f in client.read_flows(flow_filter=FlowFilter(name=FlowFilterName(any_=names)))}
    ours = sorted(flows[r.flow_id] for r in runs
                  if r.parameters.get("store") == str(tmp_path / "d" / "store.zarr") and r.state.is_completed())
    assert ours == sorted(names)
    assert "round trip: every sample and trace header equal" in proc.stdout
    assert "qualified geophysicist" in proc.stdout
    # the printed truth comparison is the report's (metrics.json holds the numbers behind it)
    import json
    import re

    metrics = json.loads((tmp_path / "d" / "report" / "metrics.json").read_text())
    printed = re.search(r"clean truth.*?: ([\d.]+) before, ([\d.]+) after", proc.stdout.replace("\n", " "))
    survey = metrics["truth_comparison"]["survey"]
    assert printed and float(printed.group(1)) == pytest.approx(survey["before"]["median"], abs=5e-4)
    assert float(printed.group(2)) == pytest.approx(survey["after"]["median"], abs=5e-4)
    store = SurveyStore.open(tmp_path / "d" / "store.zarr")
    assert len(store.manifest()) == 3
    with segyio.open(str(tmp_path / "d" / "export.sgy"), ignore_geometry=True) as f:
        f.mmap()
        assert np.array_equal(f.trace.raw[:], store.survey_array().compute())


def test_little_endian_input_exported_big_or_kept(tiny_survey, client, tmp_path):
    # segyio as an independent writer of a little-endian file (SEG-Y rev 2.0 allows either order)
    src = sorted(tiny_survey.glob("line*.sgy"))[0]
    little = tmp_path / "le.sgy"
    with segyio.open(str(src), ignore_geometry=True) as f:
        spec = segyio.tools.metadata(f)
        spec.endian = "little"
        with segyio.create(str(little), spec) as g:
            g.text[0] = f.text[0]
            g.bin = f.bin
            g.header = f.header
            g.trace = f.trace
    store = tmp_path / "s.zarr"
    ingest_swaths(store, [little], load_config(tiny_survey / "survey.toml"), client=client)
    assert SurveyStore.open(store).manifest()[0].byte_order == "little"
    res = _run("export", str(store), str(tmp_path / "big.sgy"))
    assert res.exit_code == 0
    with segyio.open(str(src), ignore_geometry=True) as a, \
            segyio.open(str(tmp_path / "big.sgy"), ignore_geometry=True) as b:
        assert np.array_equal(a.trace.raw[:], b.trace.raw[:])
        for i in (0, 100, 767):
            assert dict(a.header[i]) == dict(b.header[i])
    res = _run("export", str(store), str(tmp_path / "per"), "--per-swath", "--byte-order", "little")
    assert res.exit_code == 0
    assert (tmp_path / "per" / "le.sgy").read_bytes() == little.read_bytes()


def test_cluster_options_are_the_same_in_every_command_that_starts_a_cluster():
    from typer.main import get_command

    from descatter.flows.cli import CLUSTER_HELP

    commands = get_command(app).commands
    seen = {}
    for name in ("ingest", "estimate", "apply", "run", "swath", "demo"):
        options = {p.name: p for p in commands[name].params}
        assert options["cluster"].opts == ["--cluster"] and options["cluster"].default == "local"
        assert options["cluster"].help == CLUSTER_HELP
        assert options["workers"].opts == ["--workers"] and options["workers"].default is None
        assert options["memory_limit"].opts == ["--memory-limit"] and options["memory_limit"].default is None
        seen[name] = (options["workers"].help, options["memory_limit"].help)
    assert len(set(seen.values())) == 1
    assert "4GB" in seen["demo"][1] and "one per core" in seen["demo"][0]
    res = _run("apply", "--help")
    assert res.exit_code == 0 and "--memory-limit" in res.stdout and "--solution" in res.stdout
