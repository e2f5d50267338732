"""Prefect flows: the service entry points (``descatter run``, deployments).

Each flow owns one ``distributed.Client`` (an embedded local cluster by
default, or a scheduler address) and runs the stages as coarse Prefect
tasks: a stage is one task, and its chunk work goes straight to the Dask
client from inside it (each Prefect task run costs far more than a chunk's
Dask task, so chunks never become Prefect tasks). Checkpoints live in the store, not in Prefect's
result cache. Flow names: ``descatter-run``, ``descatter-ingest``,
``descatter-estimate``, ``descatter-apply``; parameters ``store``,
``files``, ``config``.
"""

from __future__ import annotations

import os
from pathlib import Path


def prefect_environment() -> None:
    """Settings every run needs before Prefect is imported: no telemetry (the
    network may be closed), and time for the local server's cold start
    (about 20 s here, measured, against a 20 s default)."""
    os.environ.setdefault("DO_NOT_TRACK", "1")
    os.environ.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")
    os.environ.setdefault("PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS", "120")


prefect_environment()

from prefect import flow, get_run_logger, task  # noqa: E402

from descatter.flows.apply import apply_solution  # noqa: E402
from descatter.flows.cluster import dask_client  # noqa: E402
from descatter.flows.ingest import ingest_swaths  # noqa: E402
from descatter.flows.solve import estimate_survey  # noqa: E402
from descatter.storage.config_file import config_for_store, load_config  # noqa: E402


def _progress_logger(stage: str):
    """Progress to the flow-run log every 10%, and to a Prefect progress
    artifact (shown in the server's UI) for the stage."""
    from prefect.artifacts import create_progress_artifact, update_progress_artifact

    logger = get_run_logger()
    last = {"pct": -10, "artifact": None}

    def progress(name: str, done: int, total: int) -> None:
        pct = int(100 * done / max(total, 1))
        if pct >= last["pct"] + 10 or done == total:
            last["pct"] = pct
            logger.info("%s %s: %d/%d (%d%%)", stage, name, done, total, pct)
            try:
                if last["artifact"] is None:
                    last["artifact"] = create_progress_artifact(
                        float(pct), description=f"descatter {stage}: {name} {done}/{total}")
                else:
                    update_progress_artifact(last["artifact"], float(pct),
                                             description=f"descatter {stage}: {name} {done}/{total}")
            except Exception as exc:  # progress display must never fail a run
                logger.debug("progress artifact not updated: %s", exc)

    return progress


@task(name="ingest-stage", cache_policy=None)
def ingest_stage(store: str, files: list[str], config_path: str | None, client) -> dict:
    cfg = load_config(config_path)
    report = ingest_swaths(store, files, cfg, client=client, progress=_progress_logger("ingest"))
    for w in report.warnings:
        get_run_logger().warning(w)
    return {"added": report.added, "skipped": report.skipped, "traces": report.traces,
            "resumed_chunks": report.resumed_chunks, "seconds": round(report.seconds, 3)}


@task(name="estimate-stage", cache_policy=None)
def estimate_stage(store: str, config_path: str | None, client) -> dict:
    cfg = config_for_store(store, config_path)
    result = estimate_survey(store, cfg, client=client, progress=_progress_logger("estimate"))
    for w in result["warnings"]:
        get_run_logger().warning(w)
    return {"solution": result["solution"], "summary": result["summary"], "seconds": round(result["seconds"], 3)}


@task(name="apply-stage", cache_policy=None)
def apply_stage(store: str, config_path: str | None, client, solution: str | None = None) -> dict:
    cfg = config_for_store(store, config_path)
    result = apply_solution(store, cfg, client=client, solution=solution, progress=_progress_logger("apply"))
    return {k: result[k] for k in ("solution", "traces", "passed_through", "resumed_chunks")}


def _announce(client) -> None:
    from descatter.flows.cluster import dashboard_text

    get_run_logger().info(dashboard_text(client))


@flow(name="descatter-ingest")
def ingest_flow(store: str, files: list[str], config: str | None = None, cluster: str = "local",
                workers: int | None = None, memory_limit: str | None = None) -> dict:
    """Add SEG-Y swaths to a survey store."""
    with dask_client(cluster, workers=workers, memory_limit=memory_limit) as client:
        _announce(client)
        return ingest_stage(store, [str(f) for f in files], config, client)


@flow(name="descatter-estimate")
def estimate_flow(store: str, config: str | None = None, cluster: str = "local", workers: int | None = None,
                  memory_limit: str | None = None) -> dict:
    """Spectra, pair statistics and the global solve: a new current solution."""
    with dask_client(cluster, workers=workers, memory_limit=memory_limit) as client:
        _announce(client)
        return estimate_stage(store, config, client)


@flow(name="descatter-apply")
def apply_flow(store: str, config: str | None = None, solution: str | None = None, cluster: str = "local",
               workers: int | None = None, memory_limit: str | None = None) -> dict:
    """Correct every trace with a solution's filters."""
    with dask_client(cluster, workers=workers, memory_limit=memory_limit) as client:
        _announce(client)
        return apply_stage(store, config, client, solution)


@flow(name="descatter-run")
def run_flow(store: str, files: list[str], config: str | None = None, cluster: str = "local",
             workers: int | None = None, memory_limit: str | None = None) -> dict:
    """ingest -> estimate -> apply, on one Dask cluster."""
    with dask_client(cluster, workers=workers, memory_limit=memory_limit) as client:
        _announce(client)
        out = {"ingest": ingest_stage(store, [str(Path(f)) for f in files], config, client)}
        out["estimate"] = estimate_stage(store, config, client)
        out["apply"] = apply_stage(store, config, client)
        return out
