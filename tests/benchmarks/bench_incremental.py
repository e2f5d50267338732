"""New swaths into a processed store against a full rerun, side by side.

    python tests/benchmarks/bench_incremental.py [--traces 20000] [--swaths 5] [--new 2] [--workers 2]

Writes one synthetic survey of ``--swaths`` swaths, then on one running
local cluster times (1) the whole job (ingest -> estimate -> apply) on every
swath into a new store, and (2) the same job run incrementally: the first
``swaths - new`` swaths processed first (not timed), then the last ``new``
added and the job run again (timed). Prints seconds per stage, the ratio
incremental / full, how many spectra chunks were resumed and how many
traces the correction redid, and checks that both stores hold the same
solution.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np


def _job(store: Path, files, cfg, client) -> dict:
    from descatter.flows.apply import apply_solution
    from descatter.flows.ingest import ingest_swaths
    from descatter.flows.solve import estimate_survey

    t = {}
    t0 = time.perf_counter()
    ingest_swaths(store, files, cfg, client=client)
    t["ingest"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    est = estimate_survey(store, cfg, client=client)
    t["estimate"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    app = apply_solution(store, cfg, client=client)
    t["apply"] = time.perf_counter() - t0
    t["total"] = t["ingest"] + t["estimate"] + t["apply"]
    return {"seconds": t, "estimate": est, "apply": app}


def run(n_traces: int = 20000, n_swaths: int = 5, n_new: int = 2, workers: int = 2, out=sys.stdout) -> dict:
    from descatter.flows.cluster import dask_client
    from descatter.flows.synth import write_synthetic_survey
    from descatter.storage.config_file import load_config
    from descatter.storage.estimation import read_solution
    from descatter.storage.store import SurveyStore

    if not 0 < n_new < n_swaths:
        raise SystemExit(f"--new {n_new}: expected between 1 and --swaths - 1 ({n_swaths - 1})")
    with tempfile.TemporaryDirectory(dir=Path.cwd()) as tmp, dask_client("local", workers=workers) as client:
        tmp = Path(tmp)
        rep = write_synthetic_survey(tmp / "survey", size=None, n_traces=n_traces, n_swaths=n_swaths, seed=5)
        cfg = load_config(rep.config)
        files = sorted(rep.files)
        full = _job(tmp / "full.zarr", files, cfg, client)
        _job(tmp / "inc.zarr", files[:-n_new], cfg, client)
        inc = _job(tmp / "inc.zarr", files[-n_new:], cfg, client)
        _, a, _ = read_solution(SurveyStore.open(tmp / "full.zarr"))
        _, b, _ = read_solution(SurveyStore.open(tmp / "inc.zarr"))
        same = all(np.array_equal(a[k], b[k]) for k in ("source_filter", "receiver_filter"))
    print(f"{rep.traces} traces in {n_swaths} swaths, {n_new} added to a processed store; {workers} workers",
          file=out)
    print(f"{'stage':10s} {'full s':>8s} {'incr s':>8s} {'incr/full':>10s}", file=out)
    for stage in ("ingest", "estimate", "apply", "total"):
        f, i = full["seconds"][stage], inc["seconds"][stage]
        print(f"{stage:10s} {f:8.2f} {i:8.2f} {i / f:10.2f}", file=out)
    est = inc["estimate"]
    print(f"incremental: spectra chunks resumed {est['spectra_resumed']}, statistics kept "
          f"{len(est['stats_skipped'])} ({', '.join(est['stats_skipped'])}); correction redid "
          f"{inc['apply']['recomputed']} of {inc['apply']['traces']} traces", file=out)
    print(f"same solution as the full run: {'yes' if same else 'NO'}", file=out)
    return {"full": full["seconds"], "incremental": inc["seconds"], "same_solution": same,
            "recomputed": inc["apply"]["recomputed"], "traces": inc["apply"]["traces"]}


if __name__ == "__main__":
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--traces", type=int, default=20000)
    ap.add_argument("--swaths", type=int, default=5)
    ap.add_argument("--new", type=int, default=2)
    ap.add_argument("--workers", type=int, default=2)
    a = ap.parse_args()
    run(a.traces, a.swaths, a.new, a.workers)
