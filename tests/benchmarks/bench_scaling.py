"""Seconds per trace and peak memory per worker, stage by stage, against survey size.

    python tests/benchmarks/bench_scaling.py [--sizes 10000 100000 1000000] [--workers 2]

For each size: a synthetic survey of about that many traces
(``write_synthetic_survey(n_traces=N)``, 500 samples, timed and its peak
memory measured in a fresh process), then ingest -> estimate (split into
spectra, statistics and solve by the run log) -> apply -> export on a local
Dask cluster of ``--workers`` processes. Prints, per size and stage, wall
and CPU microseconds per trace, the largest worker RSS and the driver RSS
during the stage (psutil, every 50 ms), the disk used (SEG-Y in, store by
array, SEG-Y out) and the growth exponent of each stage (log-log slope of
seconds against traces: 1 is linear). Each size's files are deleted before
the next.

A size is skipped, and said so, when the free disk is below about twice
what it needs (``bytes_needed``). The default sizes are the ones measured on
a 2-core machine: 1e6 traces (20 swaths) took 446 s there, 97 s of it the
synthetic survey, and 10 GB of disk at its peak; ``--sizes 10000 100000``
for a quicker run.

The instrumented job lives here too (``ProcessMonitor``, ``descatter_job``,
the profiling functions); bench_job and bench_estimate use it.
"""

from __future__ import annotations

import argparse
import contextlib
import multiprocessing
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np


# --------------------------------------------------------------------------- memory and CPU of processes
# (also used by bench_job and bench_estimate)


def _usage(proc) -> tuple[float, float]:
    """(RSS in MB, user + system CPU seconds) of a process; zeros once it is gone."""
    try:
        with proc.oneshot():
            t = proc.cpu_times()
            return proc.memory_info().rss / 2**20, t.user + t.system
    except Exception:  # a worker restarting or gone
        return 0.0, 0.0


class ProcessMonitor:
    """RSS and CPU time of the Dask workers and of this (driver) process,
    sampled by a thread every ``interval`` s.

    ``with monitor.stage("apply"): ...`` names a time window.
    :meth:`peak_between` (and ``peaks[stage]``) gives ``{"worker_mb":
    largest single worker RSS, "workers_mb": largest sum over the workers,
    "driver_mb": largest driver RSS}`` over a window; :meth:`cpu_between`
    the CPU seconds the workers and the driver used in it. CPU seconds
    change little when other processes share the cores, wall seconds a lot.
    """

    def __init__(self, client=None, interval: float = 0.05):
        import psutil

        self.interval = interval
        pids = list(client.run(os.getpid).values()) if client is not None else []
        self.workers = [psutil.Process(p) for p in pids]
        self.driver = psutil.Process()
        self.samples: list[tuple] = []  # (time, [worker rss], driver rss, [worker cpu], driver cpu)
        self.windows: dict[str, tuple[float, float]] = {}
        self._lock = threading.Lock()
        self._sample()
        self.idle = self.peak_between(0.0, float("inf"))
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)

    def _sample(self) -> None:
        w = [_usage(p) for p in self.workers]
        d = _usage(self.driver)
        with self._lock:
            self.samples.append((time.time(), [x[0] for x in w], d[0], [x[1] for x in w], d[1]))

    def _run(self) -> None:
        while not self._stop.wait(self.interval):
            self._sample()

    def __enter__(self) -> "ProcessMonitor":
        self._thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self._stop.set()
        self._thread.join()
        self._sample()

    @contextlib.contextmanager
    def stage(self, label: str):
        t0 = time.time()
        self._sample()
        try:
            yield
        finally:
            self._sample()
            self.windows[label] = (t0, time.time())

    def _rows(self, t0: float, t1: float) -> list[tuple]:
        with self._lock:
            return [s for s in self.samples if t0 <= s[0] <= t1]

    def peak_between(self, t0: float, t1: float) -> dict[str, float]:
        rows = self._rows(t0, t1)
        if not rows:
            return {"worker_mb": float("nan"), "workers_mb": float("nan"), "driver_mb": float("nan")}
        return {"worker_mb": max(max(r[1], default=0.0) for r in rows),
                "workers_mb": max(sum(r[1]) for r in rows), "driver_mb": max(r[2] for r in rows)}

    def cpu_between(self, t0: float, t1: float) -> dict[str, float]:
        """CPU seconds between the samples nearest before ``t0`` and after ``t1``."""
        with self._lock:
            before = [s for s in self.samples if s[0] <= t0] or self.samples[:1]
            after = [s for s in self.samples if s[0] >= t1] or self.samples[-1:]
        a, b = before[-1], after[0]
        return {"workers_cpu": sum(b[3]) - sum(a[3]), "driver_cpu": b[4] - a[4]}

    @property
    def peaks(self) -> dict[str, dict[str, float]]:
        return {k: self.peak_between(*w) for k, w in self.windows.items()}


def _peak_rss_mb(status: str) -> float:
    """VmHWM of a /proc/<pid>/status text, in MB: the peak RSS of the process's
    own memory. (``ru_maxrss`` is no use in a spawned process on Linux: it
    keeps the parent's peak across fork and exec.)"""
    for line in status.splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
    return float("nan")


def peak_rss_mb() -> float:
    """This process's peak RSS (VmHWM), or ``ru_maxrss`` where /proc is missing."""
    status = Path("/proc/self/status")
    if status.is_file():
        return _peak_rss_mb(status.read_text())
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def worker_peak_rss_mb(client) -> float:
    """Largest peak RSS (VmHWM) of the workers: each reads its own /proc/self/status."""
    texts = client.run(Path("/proc/self/status").read_text)
    return max(_peak_rss_mb(t) for t in texts.values())


def warm_page_cache(files) -> None:
    for f in files:
        subprocess.run(["cat", str(f)], stdout=subprocess.DEVNULL, check=True)


def disk_mb(path: Path) -> float:
    return sum(p.stat().st_size for p in Path(path).rglob("*") if p.is_file()) / 1e6


# --------------------------------------------------------------------------- the descatter job


def runlog_marks(store: Path, since: float) -> dict[str, float]:
    """``"<stage>:<event>"`` -> time (s since the epoch) of the last start/end
    record of each stage written after ``since``."""
    from descatter.storage.runlog import read_runlog

    marks = {}
    for r in read_runlog(store):
        if r.get("t", 0) >= since and r["event"] in ("start", "end"):
            marks[f"{r['stage']}:{r['event']}"] = r["t"]
    return marks


def task_stream_summary(records: list[dict]) -> dict:
    """Per chunk function (task key prefix) of a Dask task stream: calls, compute and transfer seconds."""
    from dask.utils import key_split

    out: dict[str, dict] = {}
    for r in records:
        row = out.setdefault(key_split(r["key"]), {"calls": 0, "compute": 0.0, "transfer": 0.0})
        row["calls"] += 1
        for ss in r.get("startstops", ()):
            if ss["action"] in ("compute", "transfer"):
                row[ss["action"]] += ss["stop"] - ss["start"]
    return out


def driver_profile_text(profile, top: int = 12) -> str:
    """The ``top`` descatter functions of a driver's cProfile by cumulative time
    (zarr's work runs on its own I/O thread: the driver waits for it in ``sync``)."""
    import io
    import pstats

    import descatter.flows

    repo = str(Path(descatter.flows.__file__).resolve().parent.parent)
    buf = io.StringIO()
    pstats.Stats(profile, stream=buf).sort_stats("cumulative").print_stats(repo, top)
    lines = buf.getvalue().splitlines()
    head = next((i for i, line in enumerate(lines) if line.lstrip().startswith("ncalls")), 0)
    return "\n".join(line.replace(repo + "/", "") for line in lines[head:head + top + 1])


def apply_breakdown(store_path: Path, cfg, calls: int = 3) -> dict:
    """Wall and CPU seconds per call of ``apply_chunk`` and of its pieces (the
    reads, the station grids, the correction kernels, the write), in-process on
    the first ``calls`` chunks of the first swath, as apply_solution runs it."""
    from descatter.flows import apply as fa
    from descatter.storage.estimation import read_solution, write_corrected_chunk
    from descatter.storage.store import SurveyStore
    from descatter.tasks import correction as corr
    from descatter.tasks.trace_qc import usable_traces
    from descatter.tasks.wavelets import band_taper

    store = SurveyStore.open(store_path)
    sid, sol_all, attrs = read_solution(store)
    settings = fa.correction_settings(store, sid, attrs, sol_all, cfg)
    rec = store.manifest()[0]
    path, name = str(store_path), rec.name
    wall: dict[str, float] = {}
    cpu: dict[str, float] = {}

    def timed(key, fn):
        t, c = time.perf_counter(), time.process_time()
        out = fn()
        wall[key] = wall.get(key, 0.0) + time.perf_counter() - t
        cpu[key] = cpu.get(key, 0.0) + time.process_time() - c
        return out

    bounds = rec.chunk_bounds()[:calls]
    n_fft, dt = settings["n_fft"], attrs["dt_s"]
    band = np.asarray(settings["band_index"], np.int64)
    t, c = time.perf_counter(), time.process_time()
    grids = fa.station_grids(sol_all, settings)
    once = (time.perf_counter() - t, time.process_time() - c)  # once per solution, not per chunk
    for i, (a, b) in enumerate(bounds):
        # a fingerprint of its own: the chunk is corrected again (the same samples)
        timed("the whole apply_chunk", lambda: fa.apply_chunk(path, name, i, a, b, sid, 0, settings,
                                                              f"bench{i:027d}", {}, grids))
        si = timed("read geometry + QC flags", lambda: store.array(name, "geometry/source_index")[a:b])
        ri = timed("read geometry + QC flags", lambda: store.array(name, "geometry/receiver_index")[a:b])
        flags = timed("read geometry + QC flags", lambda: store.array(name, "qc_flags")[a:b])
        traces = timed("read traces", lambda: store.array(name, "traces")[a:b])
        skip = ~usable_traces(flags, si, ri, exclude_bits=settings["exclude_bits"])
        weight = corr.grid_band_weight(band_index=band, n_rfft=n_fft // 2 + 1, taper=settings["taper_bins"])
        spectrum = settings.get("prewhitening_spectrum")
        pw = settings["prewhitening"] if spectrum is None else np.asarray(spectrum, np.float64)
        corners = settings.get("shaping_hz")
        shaping = band_taper(np.fft.rfftfreq(n_fft, dt), corners_hz=tuple(corners)) if corners else None
        c = timed("kernel trace_correction", lambda: corr.trace_correction(
            grids["source"], grids["receiver"], np.maximum(si, 0), np.maximum(ri, 0), mode=settings["mode"],
            prewhitening=pw, band_weight=weight, shaping=shaping))
        out = timed("kernel apply_correction", lambda: corr.apply_correction(traces, c, n_fft=n_fft, passthrough=skip))
        timed("write corrected chunk (+ its solution index)",
              lambda: write_corrected_chunk(path, name, a, out, np.zeros(b - a, np.int32)))
    return {"station grids, once per solution (not per chunk)": once,
            **{k: (wall[k] / len(bounds), cpu[k] / len(bounds)) for k in wall}}


def descatter_job(files, config_path: Path, work: Path, client, monitor: ProcessMonitor, *,
                  profile: bool = False) -> dict:
    """ingest -> estimate -> apply -> export on ``client``; seconds per stage.

    The estimate is split from its run-log records into spectra (from the
    stage's start to the spectra end record), statistics (to the stats end
    record) and solve (the rest: the global solve and the solution write).
    ``profile``: also a cProfile of the driver per stage and the Dask task
    stream of the workers (``profiles``, ``tasks``)."""
    import cProfile

    from distributed import get_task_stream

    from descatter.flows.apply import apply_solution
    from descatter.flows.export import export_segy
    from descatter.flows.ingest import ingest_swaths
    from descatter.flows.solve import estimate_survey
    from descatter.storage.config_file import load_config

    cfg = load_config(config_path)
    store, out_dir = work / "store.zarr", work / "descatter_out"
    sec, profiles, result = {}, {}, {}
    stages = {
        "ingest": lambda: ingest_swaths(store, files, cfg, client=client),
        "estimate": lambda: estimate_survey(store, cfg, client=client),
        "apply": lambda: apply_solution(store, cfg, client=client),
        "export": lambda: export_segy(store, out_dir, array="corrected", per_swath=True),
    }
    wall0 = time.time()
    t0 = time.perf_counter()
    with get_task_stream(client) if profile else contextlib.nullcontext() as ts:
        for name, fn in stages.items():
            prof = cProfile.Profile() if profile else None
            with monitor.stage(name):
                t = time.perf_counter()
                if prof:
                    prof.enable()
                result[name] = fn()
                if prof:
                    prof.disable()
                    profiles[name] = prof
                sec[name] = time.perf_counter() - t
    sec["total"] = time.perf_counter() - t0
    marks = runlog_marks(store, wall0)
    windows = {"spectra": (marks["estimate:start"], marks["spectra:end"]),
               "statistics": (marks["spectra:end"], marks["stats:end"]),
               "solve": (marks["stats:end"], marks["estimate:end"])}
    for k, (a, b) in windows.items():
        sec[k] = b - a
    return {"seconds": sec, "outputs": result["export"].files, "store": store, "started": wall0, "windows": windows,
            "profiles": profiles, "tasks": task_stream_summary(ts.data) if profile else {}}


# --------------------------------------------------------------------------- the benchmark

STAGES = ("ingest", "spectra", "statistics", "solve", "apply", "export")
N_SAMPLES = 500  # what synthetic_spec(n_traces=N) records


def bytes_needed(n_traces: int, n_samples: int = N_SAMPLES) -> int:
    """Disk for one size: SEG-Y in, store traces and corrected traces (about
    raw size each, the codec gains little on noise), spectra, SEG-Y out,
    truth file (clean traces below 6e7 samples)."""
    trace = n_samples * 4 + 240
    return int(n_traces * (4 * trace + 300 * 8 + (n_samples * 4 if n_traces * n_samples <= 6e7 else 0)))


def _synth_child(out: str, n_traces: int, seed: int) -> dict:
    from descatter.flows.synth import write_synthetic_survey

    idle = peak_rss_mb()
    t = time.perf_counter()
    rep = write_synthetic_survey(out, size=None, n_traces=n_traces, seed=seed)
    return {"seconds": time.perf_counter() - t, "peak_rss_mb": peak_rss_mb(), "idle_mb": idle,
            "files": [str(f) for f in rep.files], "config": str(rep.config), "traces": rep.traces,
            "n_swaths": len(rep.files), "n_samples": rep.spec.n_samples}


def synthesize(out: Path, n_traces: int, seed: int) -> dict:
    """write_synthetic_survey in a fresh process: seconds and its own peak RSS."""
    ctx = multiprocessing.get_context("spawn")
    with ctx.Pool(1) as pool:
        pool.apply(_import_synth)
        return pool.apply(_synth_child, (str(out), n_traces, seed))


def _import_synth() -> None:
    import descatter.flows.synth  # noqa: F401


def store_disk(store: Path) -> dict[str, float]:
    """MB on disk of the store's arrays, grouped: traces, corrected, spectra, everything else."""
    out = {"traces": 0.0, "corrected": 0.0, "spectra": 0.0, "other": 0.0}
    for p in store.rglob("*"):
        if not p.is_file():
            continue
        parts = p.relative_to(store).parts
        kind = parts[2] if len(parts) > 2 and parts[0] == "swaths" and parts[2] in out else "other"
        out[kind] += p.stat().st_size / 1e6
    return out


def _slope(sizes, values) -> float:
    ok = [(n, v) for n, v in zip(sizes, values) if v > 0]
    if len(ok) < 2:
        return float("nan")
    n, v = zip(*ok)
    return float(np.polyfit(np.log(n), np.log(v), 1)[0])


def _synth_here(out: Path, n_traces: int, seed: int) -> dict:
    from descatter.flows.synth import write_synthetic_survey

    t = time.perf_counter()
    rep = write_synthetic_survey(out, size=None, n_traces=n_traces, seed=seed)
    return {"seconds": time.perf_counter() - t, "peak_rss_mb": float("nan"), "idle_mb": float("nan"),
            "files": [str(f) for f in rep.files], "config": str(rep.config), "traces": rep.traces,
            "n_swaths": len(rep.files), "n_samples": rep.spec.n_samples}


def run_size(n_traces: int, workers: int, seed: int, root: Path, *, client=None, measure_synth: bool = True) -> dict:
    """One size: synth, the job on a fresh local cluster (or on ``client``), disk, then delete."""
    from descatter.flows.cluster import dask_client

    work = Path(tempfile.mkdtemp(dir=root, prefix=f"scaling_{n_traces}_"))
    try:
        synth = synthesize(work / "survey", n_traces, seed) if measure_synth else _synth_here(work / "survey",
                                                                                              n_traces, seed)
        files = [Path(f) for f in synth["files"]]
        warm_page_cache(files)
        t = time.perf_counter()
        with (dask_client("local", workers=workers) if client is None else contextlib.nullcontext(client)) as c:
            cluster_s = time.perf_counter() - t
            with ProcessMonitor(c) as monitor:
                job = descatter_job(files, Path(synth["config"]), work, c, monitor)
            worker_peak = worker_peak_rss_mb(c)
        windows = monitor.windows | job["windows"]
        windows["total"] = (windows["ingest"][0], windows["export"][1])
        peaks = {k: monitor.peak_between(*w) for k, w in windows.items()}
        cpu = {k: sum(monitor.cpu_between(*w).values()) for k, w in windows.items()}
        disk = {"segy_in": sum(f.stat().st_size for f in files) / 1e6,
                "truth": (work / "survey" / "truth.npz").stat().st_size / 1e6,
                **{f"store_{k}": v for k, v in store_disk(job["store"]).items()},
                "segy_out": sum(Path(f).stat().st_size for f in job["outputs"]) / 1e6}
        disk["total"] = disk_mb(work)
        return {"traces": synth["traces"], "swaths": synth["n_swaths"], "synth": synth, "seconds": job["seconds"],
                "peaks": peaks, "cpu": cpu, "idle": monitor.idle, "worker_peak_rss_mb": worker_peak, "disk": disk,
                "cluster_s": cluster_s}
    finally:
        shutil.rmtree(work, ignore_errors=True)


def run(sizes=(10_000, 100_000, 1_000_000), workers: int = 2, seed: int = 0, *, fresh_cluster: bool = True,
        measure_synth: bool = True, out=sys.stdout) -> dict:
    """Every size in turn; ``fresh_cluster=False`` runs them all on one cluster
    (quicker; a worker's RSS may then hold memory of an earlier size) and
    ``measure_synth=False`` writes the surveys in this process (no peak RSS)."""
    from descatter.flows.cluster import dask_client

    root = Path.cwd()
    print(f"scaling benchmark: sizes {list(sizes)} (about; the synthetic grid rounds), {workers} Dask worker(s)"
          f"{'' if fresh_cluster else ', one cluster for all sizes'}, load average {os.getloadavg()[0]:.1f} at the "
          "start", file=out, flush=True)
    rows = {}
    with contextlib.ExitStack() as stack:
        shared = None if fresh_cluster else stack.enter_context(dask_client("local", workers=workers))
        for n in sizes:
            free = shutil.disk_usage(root).free
            need = bytes_needed(n)
            if free < 2 * need:
                print(f"n={n}: skipped, needs about {need / 1e9:.1f} GB and {free / 1e9:.1f} GB are free", file=out,
                      flush=True)
                continue
            t = time.perf_counter()
            r = run_size(n, workers, seed, root, client=shared, measure_synth=measure_synth)
            r["wall"] = time.perf_counter() - t
            rows[n] = r
            _print_size(r, out)
    if len(rows) > 1:
        ns = [rows[n]["traces"] for n in rows]
        print(f"growth exponent (log-log slope of seconds vs traces, {ns[0]}..{ns[-1]}): " + ", ".join(
            f"{k} {_slope(ns, [rows[n]['seconds'][k] for n in rows]):.2f}" for k in (*STAGES, "total")), file=out)
        print("  of CPU seconds: " + ", ".join(
            f"{k} {_slope(ns, [rows[n]['cpu'][k] for n in rows]):.2f}" for k in (*STAGES, "total")),
              file=out, flush=True)
    return rows


def _print_size(r: dict, out) -> None:
    s, m, n = r["synth"], r["peaks"], r["traces"]
    print(f"n={n} traces ({r['swaths']} swaths x {s['n_samples']} samples), wall {r['wall']:.0f} s, "
          f"load average {os.getloadavg()[0]:.1f}", file=out)
    print(f"  synth: {s['seconds']:.1f} s, {1e6 * s['seconds'] / n:.0f} us/trace, peak RSS {s['peak_rss_mb']:.0f} MB "
          f"(idle {s['idle_mb']:.0f}; samples are written 1,000 traces at a time, but clean copies are kept for "
          "truth.npz up to 6e7 samples)", file=out)
    print(f"  {'stage':<12}{'seconds':>9}{'us/trace':>10}{'CPU s':>8}{'CPU us/trace':>14}{'worker MB':>11}"
          f"{'driver MB':>11}", file=out)
    for k in (*STAGES, "total"):
        sec, cpu = r["seconds"][k], r["cpu"][k]
        print(f"  {k:<12}{sec:>9.2f}{1e6 * sec / n:>10.0f}{cpu:>8.2f}{1e6 * cpu / n:>14.0f}"
              f"{m[k]['worker_mb']:>11.0f}{m[k]['driver_mb']:>11.0f}", file=out)
    print(f"  (CPU: workers and driver; idle worker {r['idle']['worker_mb']:.0f} MB, workers' VmHWM "
          f"{r['worker_peak_rss_mb']:.0f} MB, cluster start {r['cluster_s']:.1f} s not counted)", file=out)
    print("  disk MB: " + ", ".join(f"{k} {v:.0f}" for k, v in r["disk"].items()), file=out, flush=True)


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=int, nargs="+", default=[10_000, 100_000, 1_000_000])
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args(argv)
    run(tuple(args.sizes), args.workers, args.seed)


if __name__ == "__main__":
    main()
