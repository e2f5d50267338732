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


@pytest.fixture
def survey_copy(tiny_survey, tmp_path) -> Path:
    dst = tmp_path / "survey"
    shutil.copytree(tiny_survey, dst)
    return dst
