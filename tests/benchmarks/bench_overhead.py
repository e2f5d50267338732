"""Orchestration overhead of ``run_flow`` against a running Prefect server.

    python tests/benchmarks/bench_overhead.py [--size demo | --traces N] [--workers 2]

Starts a Prefect server first (``prefect_test_harness``: a server
subprocess on 127.0.0.1 with a temporary database; its start-up is timed
apart), writes a synthetic survey and warms the page cache, then:

1. ``run_flow`` (ingest -> estimate -> apply, one Prefect flow, its own
   local Dask cluster of ``--workers`` processes, started and stopped by
   the flow): wall seconds, and the
   run log's chunk-function seconds (``batch`` records of ingest, spectra
   statistics and apply carry ``seconds``, I/O included; a statistics
   record's seconds are those of every task summed into it);
2. ``run_flow`` again on the finished store: every chunk is skipped, so its
   wall time is close to the pure cost of the flow, the cluster and the
   checks;
3. ``run_flow`` into a new store on a Dask cluster that is already
   running (the service set-up: the flow connects to its scheduler), the
   same worker count and settings;
4. the same stages called directly on a local cluster started the same way,
   without Prefect.

Overhead = wall - (sum of chunk seconds) / workers, as a fraction of wall.
The solve runs as a graph of tasks on the workers; each writes its seconds
like a chunk. The residual is also split by the run log's stage records
into: before the first record (flow start, cluster start), the driver's
share of each stage (stage wall - task seconds / workers; the solve's also
shown apart: its graph is narrower than the workers at times), the gaps
between stages (Prefect task transitions) and after the last record (flow
and cluster shut-down).
"""

from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
import tempfile
import time
from collections import defaultdict
from pathlib import Path

os.environ.setdefault("DO_NOT_TRACK", "1")
os.environ.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")

# the stages whose batch records carry seconds (the solve's: one per task of its graph)
CHUNK_STAGES = ("ingest", "spectra", "stats", "solve", "apply")


def runlog_since(store: Path, since: float) -> list[dict]:
    from descatter.storage.runlog import read_runlog

    return [r for r in read_runlog(store) if r.get("t", 0) >= since]


def account(records: list[dict], *, start: float, stop: float, workers: int) -> dict:
    """Chunk seconds per stage, stage windows, and the residual split (module notes)."""
    chunk = defaultdict(float)
    marks = {}
    for r in records:
        if r["event"] in ("batch", "task") and "seconds" in r and not r.get("resumed", False):
            chunk[r["stage"]] += float(r["seconds"])
        if r["event"] == "start":
            marks.setdefault(f"{r['stage']}:start", r["t"])
        elif r["event"] == "end":
            marks[f"{r['stage']}:end"] = r["t"]
    wall = stop - start
    summed = sum(chunk.values())
    out = {"wall": wall, "chunk_seconds": dict(chunk), "summed": summed,
           "overhead": wall - summed / workers, "fraction": (wall - summed / workers) / wall if wall > 0 else 0.0}
    times = [r["t"] for r in records]
    if not times or "estimate:start" not in marks:
        return out
    first, last = min(times), max(times)
    stage_wall = {
        "ingest": marks.get("ingest:end", marks["estimate:start"]) - marks.get("ingest:start", first),
        "spectra": marks["spectra:end"] - marks["estimate:start"],
        "stats": marks["stats:end"] - marks["spectra:end"],
        "solve": marks["estimate:end"] - marks["stats:end"],
        "apply": marks["apply:end"] - marks["apply:start"],
    }
    driver = {k: max(stage_wall[k] - chunk.get(k, 0.0) / workers, 0.0) for k in CHUNK_STAGES}
    gaps = (marks["estimate:start"] - marks.get("ingest:end", marks["estimate:start"])) + \
        (marks["apply:start"] - marks["estimate:end"])
    out["split"] = {
        "before first record (flow + cluster start)": first - start,
        "chunk stages, driver share (wall - chunk s / workers)": sum(driver.values()),
        "  of which the solve (its wall - its task s / workers)": driver["solve"],
        "between stages (Prefect task transitions)": gaps,
        "after last record (flow + cluster shut-down)": stop - last,
    }
    out["stage_wall"] = stage_wall
    out["driver_share"] = driver
    return out


def direct_stages(store: Path, files, config: Path, workers: int) -> float:
    """ingest -> estimate -> apply without Prefect, cluster start and stop included like run_flow."""
    from descatter.flows.apply import apply_solution
    from descatter.flows.cluster import dask_client
    from descatter.flows.ingest import ingest_swaths
    from descatter.flows.solve import estimate_survey
    from descatter.storage.config_file import config_for_store, load_config

    t = time.perf_counter()
    with dask_client("local", workers=workers) as client:
        ingest_swaths(store, files, load_config(config), client=client)
        estimate_survey(store, config_for_store(store, config), client=client)
        apply_solution(store, config_for_store(store, config), client=client)
    return time.perf_counter() - t


def run(n_traces: int | None = None, size: str | None = "demo", workers: int = 2, seed: int = 0,
        out=sys.stdout) -> dict:
    from descatter.flows.service import prefect_environment

    prefect_environment()
    from prefect.testing.utilities import prefect_test_harness

    from descatter.flows.service import run_flow
    from descatter.flows.synth import write_synthetic_survey

    with tempfile.TemporaryDirectory(dir=Path.cwd(), prefix="bench_overhead_") as tmp:
        tmp = Path(tmp)
        synth = write_synthetic_survey(tmp / "survey", size=size if n_traces is None else None, n_traces=n_traces,
                                       seed=seed)
        files = [str(f) for f in synth.files]
        for f in files:
            subprocess.run(["cat", f], stdout=subprocess.DEVNULL, check=True)
        load0 = os.getloadavg()[0]
        t = time.perf_counter()
        with prefect_test_harness(server_startup_timeout=120):
            server_s = time.perf_counter() - t
            store = tmp / "store.zarr"
            runs = {}
            for label in ("first run", "rerun, all done"):
                start = time.time()
                run_flow(str(store), files, str(synth.config), workers=workers)
                stop = time.time()
                runs[label] = account(runlog_since(store, start), start=start, stop=stop, workers=workers)
            # the service set-up: a Dask cluster already running (a scheduler the flow connects
            # to, as with --cluster tcp://HOST:PORT), started the way the flow starts its own
            from descatter.flows.cluster import build_cluster
            from descatter.tasks.cluster_profile import LocalProfile

            # (its workers import the stage modules as they start: flows/worker_setup.py)
            with build_cluster(LocalProfile(workers=workers)) as lc:
                running = tmp / "running.zarr"
                start = time.time()
                run_flow(str(running), files, str(synth.config), cluster=lc.scheduler_address)
                stop = time.time()
                runs["on a running cluster"] = account(runlog_since(running, start), start=start, stop=stop,
                                                       workers=workers)
            shutil.rmtree(running, ignore_errors=True)
        direct_store = tmp / "direct.zarr"
        direct = direct_stages(direct_store, files, synth.config, workers)
        load1 = os.getloadavg()[0]
        shutil.rmtree(direct_store, ignore_errors=True)

    first = runs["first run"]
    print(f"overhead benchmark: {synth.traces} traces x {synth.spec.n_samples} samples in {len(files)} swaths, "
          f"{workers} Dask worker(s); Prefect server started in {server_s:.1f} s (not counted); "
          f"load average {load0:.1f} -> {load1:.1f}", file=out)
    print(f"{'':<30}{'wall s':>9}{'chunk s':>9}{'chunk s / workers':>19}{'overhead s':>12}{'fraction':>10}", file=out)
    for label, r in runs.items():
        print(f"{'run_flow, ' + label:<30}{r['wall']:>9.2f}{r['summed']:>9.2f}{r['summed'] / workers:>19.2f}"
              f"{r['overhead']:>12.2f}{r['fraction']:>10.2f}", file=out)
    print(f"{'same stages, no Prefect':<30}{direct:>9.2f}   (run_flow / direct = {first['wall'] / direct:.2f}; "
          f"Prefect's share of the first run {(first['wall'] - direct) / first['wall']:.2f})", file=out)
    print("chunk seconds per stage (run log): " + ", ".join(f"{k} {v:.2f}" for k, v in first["chunk_seconds"].items()),
          file=out)
    for label in ("first run", "on a running cluster"):
        r = runs[label]
        if "split" not in r:
            continue
        print(f"{label}: wall split by the run log's stage records:", file=out)
        for k, v in r["split"].items():
            print(f"  {k:<56}{v:>8.2f} s {v / r['wall']:>6.1%}", file=out)
        print("  stage walls: " + ", ".join(f"{k} {v:.2f} s" for k, v in r["stage_wall"].items()), file=out)
    out.flush()
    return {"runs": runs, "direct": direct, "server_s": server_s, "traces": synth.traces, "workers": workers}


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--traces", type=int, default=0, help="about this many traces (0: use --size)")
    ap.add_argument("--size", default="demo", help="a synthetic preset (tiny, demo: 28,800 traces) when --traces is 0")
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args(argv)
    run(args.traces or None, args.size, args.workers, args.seed)


if __name__ == "__main__":
    main()
