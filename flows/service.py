"""Prefect flows: the service entry points (``descatter run``, the
single-stage commands, deployments).

Each flow owns one ``distributed.Client`` (an embedded local cluster by
default, or a scheduler address) and runs the stages as coarse Prefect
tasks: a stage is one task, and its chunk work goes straight to the Dask
client from inside it (each Prefect task run costs far more than a chunk's
Dask task, so chunks never become Prefect tasks). Checkpoints live in the
store, not in Prefect's result cache. Flow names: ``descatter-run``,
``descatter-ingest``, ``descatter-estimate``, ``descatter-apply``,
``descatter-swath``; parameters ``store``, ``config`` and the cluster's,
``files`` (run, ingest), ``solution``, ``mode``, ``prewhitening`` (apply),
``action``, ``name``, ``file`` (swath).

Every flow also takes an optional ``progress`` callable, ``(part, done,
total)``, called in the flow's process as chunks finish: the command line
passes one that draws its progress bars. Prefect validates it as a callable;
the parameters it records for the run hold an empty placeholder for it (a
function is not JSON), and a deployment's runs leave it at None.
"""

from __future__ import annotations

import os
from contextlib import contextmanager
from pathlib import Path
from typing import Callable, Iterator, Optional


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
from descatter.tasks.config import SurveyConfig  # noqa: E402
from descatter.storage.lock import StoreLock  # noqa: E402
from descatter.tasks.errors import DescatterError  # noqa: E402


@contextmanager
def local_run() -> Iterator[None]:
    """Prefect settings for flows that a command runs in this process.

    With no Prefect server configured (``PREFECT_API_URL`` unset), Prefect
    serves the runs from a temporary server that ends with the process. No
    server is then left to watch the runs' heartbeats (they let a lasting
    server detect crashed runs), so they are turned off: each flow waited up
    to 1 s at its end for its heartbeat thread, which sleeps in 1 s steps (an
    empty flow took 1.07 s with it and 0.10 s without, measured on Prefect
    3.9.1). With a server configured, Prefect's own settings stand.
    """
    from prefect.settings import PREFECT_API_URL, PREFECT_FLOWS_HEARTBEAT_FREQUENCY, temporary_settings

    if PREFECT_API_URL.value():
        yield
        return
    with temporary_settings(updates={PREFECT_FLOWS_HEARTBEAT_FREQUENCY: None}):
        yield


# (part, done, total): a swath at ingest (traces); spectra, statistics, solve
# at estimate; apply (traces)
Progress = Callable[[str, int, int], None]
# Each artifact update is a call to the Prefect server, made while the flow waits for
# chunks (about 8 ms each here, measured): at most one per part per second.
ARTIFACT_INTERVAL_S = 1.0


def _stage_progress(stage: str, forward: Progress | None = None) -> Progress:
    """Progress of one stage: to the flow-run log and to one Prefect progress
    artifact per part (shown in the server's UI) at every 10% but at most
    once per ``ARTIFACT_INTERVAL_S`` (and always at the end), and on to
    ``forward`` at every call."""
    import time

    from prefect.artifacts import create_progress_artifact, update_progress_artifact

    logger = get_run_logger()
    parts: dict[str, dict] = {}

    def progress(name: str, done: int, total: int) -> None:
        if forward is not None:
            forward(name, done, total)
        pct = 100 if done >= total else int(100 * done / total)
        part = parts.setdefault(name, {"pct": None, "artifact": None, "t": 0.0})
        now = time.monotonic()
        if part["pct"] is not None and done < total and (pct < part["pct"] + 10
                                                          or now - part["t"] < ARTIFACT_INTERVAL_S):
            return
        part["pct"], part["t"] = pct, now
        logger.info("%s %s: %d/%d (%d%%)", stage, name, done, total, pct)
        description = f"descatter {stage}: {name} {done}/{total}"
        try:
            if part["artifact"] is None:
                part["artifact"] = create_progress_artifact(float(pct), description=description)
            else:
                update_progress_artifact(part["artifact"], float(pct), description=description)
        except Exception as exc:  # progress display must never fail a run
            logger.warning("progress artifact of %s %s not updated: %s", stage, name, exc)

    return progress


def correction_config(store: str | Path, config_path: str | Path | None, *, mode: str | None = None,
                      prewhitening: float | None = None) -> SurveyConfig:
    """The apply stage's config: the given file (default: the one kept at
    ingest) with the command line's correction overrides, checked."""
    cfg = config_for_store(store, config_path)
    try:
        if mode is not None:
            cfg.correction.mode = mode
        if prewhitening is not None:  # a fraction given by hand: the fixed prewhitening
            cfg.correction.prewhitening = prewhitening
            cfg.correction.prewhitening_mode = "fixed"
    except ValueError as exc:
        raise DescatterError(f"bad option: {exc}") from None
    return cfg


def _ingest_config(store: str, config_path: str | None) -> SurveyConfig:
    """The config file given; without one, the config kept in an existing
    store (adding swaths must not reset it to the defaults), else the defaults."""
    from descatter.tasks.errors import InputNotFoundError

    if config_path is None:
        try:
            return config_for_store(store, None)
        except InputNotFoundError:  # no store yet: it is created with the defaults
            pass
    return load_config(config_path)


@task(name="ingest-stage", cache_policy=None)
def ingest_stage(store: str, files: list[str], config_path: str | None, client,
                 progress: Progress | None = None) -> dict:
    cfg = _ingest_config(store, config_path)
    report = ingest_swaths(store, files, cfg, client=client, progress=_stage_progress("ingest", progress))
    for w in report.warnings:
        get_run_logger().warning(w)
    return {"added": report.added, "skipped": report.skipped, "traces": report.traces,
            "resumed_chunks": report.resumed_chunks, "bytes_read": report.bytes_read,
            "seconds": round(report.seconds, 3), "warnings": report.warnings}


@task(name="estimate-stage", cache_policy=None)
def estimate_stage(store: str, config_path: str | None, client, progress: Progress | None = None) -> dict:
    cfg = config_for_store(store, config_path)
    result = estimate_survey(store, cfg, client=client, progress=_stage_progress("estimate", progress))
    for w in result["warnings"]:
        get_run_logger().warning(w)
    return {"solution": result["solution"], "summary": result["summary"], "warnings": result["warnings"],
            "seconds": round(result["seconds"], 3)}


@task(name="apply-stage", cache_policy=None)
def apply_stage(store: str, config_path: str | None, client, solution: str | None = None,
                mode: str | None = None, prewhitening: float | None = None,
                progress: Progress | None = None) -> dict:
    cfg = correction_config(store, config_path, mode=mode, prewhitening=prewhitening)
    result = apply_solution(store, cfg, client=client, solution=solution, progress=_stage_progress("apply", progress))
    out = {k: result[k] for k in ("solution", "traces", "recomputed", "passed_through", "resumed_chunks")}
    out["settings"] = {k: result["settings"][k] for k in ("mode", "prewhitening", "prewhitening_mode")}
    out["warnings"] = result["warnings"]
    for w in result["warnings"]:
        get_run_logger().warning(w)
    out["seconds"] = round(result["seconds"], 3)
    return out


def _announce(client) -> None:
    from descatter.flows.cluster import dashboard_text

    get_run_logger().info(dashboard_text(client))


@flow(name="descatter-ingest")
def ingest_flow(store: str, files: list[str], config: Optional[str] = None, cluster: str = "local",
                workers: Optional[int] = None, memory_limit: Optional[str] = None,
                progress: Optional[Progress] = None) -> dict:
    """Add SEG-Y swaths to a survey store."""
    with dask_client(cluster, workers=workers, memory_limit=memory_limit) as client:
        _announce(client)
        return ingest_stage(store, [str(f) for f in files], config, client, progress)


@flow(name="descatter-estimate")
def estimate_flow(store: str, config: Optional[str] = None, cluster: str = "local", workers: Optional[int] = None,
                  memory_limit: Optional[str] = None, progress: Optional[Progress] = None) -> dict:
    """Spectra, pair statistics and the global solve: a new current solution."""
    with dask_client(cluster, workers=workers, memory_limit=memory_limit) as client:
        _announce(client)
        return estimate_stage(store, config, client, progress)


@flow(name="descatter-apply")
def apply_flow(store: str, config: Optional[str] = None, solution: Optional[str] = None, cluster: str = "local",
               workers: Optional[int] = None, memory_limit: Optional[str] = None, mode: Optional[str] = None,
               prewhitening: Optional[float] = None, progress: Optional[Progress] = None) -> dict:
    """Correct every trace with a solution's filters (``mode`` and
    ``prewhitening`` override the config's correction settings)."""
    with dask_client(cluster, workers=workers, memory_limit=memory_limit) as client:
        _announce(client)
        return apply_stage(store, config, client, solution, mode, prewhitening, progress)


@flow(name="descatter-run")
def run_flow(store: str, files: list[str], config: Optional[str] = None, cluster: str = "local",
             workers: Optional[int] = None, memory_limit: Optional[str] = None,
             progress: Optional[Progress] = None) -> dict:
    """ingest -> estimate -> apply, on one Dask cluster, holding the store's
    lock throughout (no other writer runs between the stages). Files already
    in the store are skipped, so a rerun with new swaths is incremental."""
    with dask_client(cluster, workers=workers, memory_limit=memory_limit) as client, \
            StoreLock(store, command="run"):
        _announce(client)
        out = {"ingest": ingest_stage(store, [str(Path(f)) for f in files], config, client, progress)}
        out["estimate"] = estimate_stage(store, config, client, progress)
        out["apply"] = apply_stage(store, config, client, progress=progress)
        return out


@task(name="swath-stage", cache_policy=None)
def swath_stage(store: str, action: str, name: str, file: Optional[str], config_path: Optional[str], client,
                progress: Optional[Progress] = None) -> dict:
    from descatter.flows.swaths import remove_swath_and_update, replace_swath_and_update

    cfg = config_for_store(store, config_path)
    forward = _stage_progress(action, progress)
    if action == "remove":
        out = remove_swath_and_update(store, name, cfg, client=client, progress=forward)
    else:
        out = replace_swath_and_update(store, name, file, cfg, client=client, progress=forward)
    est, app = out.get("estimate"), out.get("apply")
    return {
        "removed": out["removed"],
        "added": out["ingest"].added if "ingest" in out else [],
        "solution": est["solution"] if est else None,
        "warnings": est["warnings"] if est else [],
        "recomputed": app["recomputed"] if app else 0,
        "traces": app["traces"] if app else 0,
    }


@flow(name="descatter-swath")
def swath_flow(store: str, action: str, name: str, file: Optional[str] = None, config: Optional[str] = None,
               cluster: str = "local", workers: Optional[int] = None, memory_limit: Optional[str] = None,
               progress: Optional[Progress] = None) -> dict:
    """Remove a swath, or replace it by a new file (``action`` remove or
    replace), then solve and re-apply where station filters changed."""
    if action not in ("remove", "replace"):
        raise DescatterError(f"swath action {action!r}: expected 'remove' or 'replace'")
    if (action == "replace") != (file is not None):
        raise DescatterError("swath replace takes the new SEG-Y file; swath remove takes none")
    with dask_client(cluster, workers=workers, memory_limit=memory_limit) as client:
        _announce(client)
        return swath_stage(store, action, name, file, config, client, progress)
