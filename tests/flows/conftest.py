from __future__ import annotations

import os
import shutil
from pathlib import Path

import pytest

os.environ.setdefault("DO_NOT_TRACK", "1")
os.environ.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")


@pytest.fixture(scope="session")
def tiny_survey(tmp_path_factory) -> Path:
    """A tiny synthetic scattering survey on disk (lineNN.sgy, survey.toml, truth.npz).
    Tests must copy files they modify."""
    from descatter.flows.synth import write_synthetic_survey

    out = tmp_path_factory.mktemp("tiny_survey")
    write_synthetic_survey(out, scenario="scatter", size="tiny", seed=3)
    return out


@pytest.fixture(scope="session")
def client():
    """One small local cluster of worker processes for the whole session."""
    from descatter.flows.cluster import dask_client

    with dask_client("local", workers=2) as c:
        yield c


@pytest.fixture(scope="session")
def prefect_harness() -> str:
    """One temporary Prefect server and database for the whole session (its
    cold start costs about 20 s); yields its API URL.

    While it runs, PREFECT_API_URL names it in this process's environment
    too, so a command-line subprocess reports to it instead of starting a
    server of its own.
    """
    from descatter.flows.service import prefect_environment

    prefect_environment()
    from prefect.settings import PREFECT_API_URL
    from prefect.testing.utilities import prefect_test_harness

    with prefect_test_harness(server_startup_timeout=120):
        url = PREFECT_API_URL.value()
        before = os.environ.get("PREFECT_API_URL")
        os.environ["PREFECT_API_URL"] = url
        try:
            yield url
        finally:
            if before is None:
                os.environ.pop("PREFECT_API_URL", None)
            else:
                os.environ["PREFECT_API_URL"] = before


@pytest.fixture(scope="session")
def service_run(prefect_harness, tiny_survey, tmp_path_factory) -> dict:
    """One descatter-run flow run on the tiny survey, in this process under
    the harness: its store (tests copy it to change it), flow-run id, result,
    and every call the flow made to its progress callable."""
    from descatter.flows.service import run_flow

    store = tmp_path_factory.mktemp("service_run") / "s.zarr"
    calls: list[tuple[str, int, int]] = []
    lines = [str(p) for p in sorted(tiny_survey.glob("line*.sgy"))]
    state = run_flow(str(store), lines, str(tiny_survey / "survey.toml"), workers=1,
                     progress=lambda part, done, total: calls.append((part, done, total)), return_state=True)
    return {"store": store, "flow_run_id": state.state_details.flow_run_id, "result": state.result(),
            "progress": calls, "files": lines}


@pytest.fixture
def survey_copy(tiny_survey, tmp_path) -> Path:
    dst = tmp_path / "survey"
    shutil.copytree(tiny_survey, dst)
    return dst
