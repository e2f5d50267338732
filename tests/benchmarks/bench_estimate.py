"""Spectra and pair statistics against the FFT floor, side by side.

    python tests/benchmarks/bench_estimate.py [--traces 100000] [--window-end 1.0] [--workers 2] [--calls 3]
        [--chunk-traces N] [--group-traces N]

Writes a synthetic survey, ingests it (not timed), then times the estimation
chain as ``estimate_survey`` drives it: ``run_statistics`` (spectra chunk
tasks, then the receiver-pair, source-pair and log-power tasks, their tree
sums and writes) on a local Dask cluster, split into its two stages by the
run-log records. Against it, on the same traces (read into memory first):

- the FFT floor: ``scipy.fft.rfft`` (and ``numpy.fft.rfft``) of every
  trace's analysis window at the same ``n_fft``, in blocks of one chunk, in
  one process, and in ``--workers`` processes at once (each a share of the
  traces, started together);
- the kernels alone, in one process, no I/O and no Dask: ``windowed_spectra``
  chunk by chunk, and the pair and log-power sums over the same shot,
  receiver and chunk groups as the tasks.

Ratios (target: spectra + statistics <= 2x the floor): wall seconds over
the 1-process floor shared out over the cores, and CPU seconds (the
workers' and the driver's, sampled with psutil) over the floor's CPU
seconds, which other processes on the cores move much less; and the chain
over the kernels alone, in CPU seconds (what orchestration and I/O add). Then per chunk
function, from the Dask task stream: calls, compute seconds and the mean per
call; and for a few calls of each, timed in-process on the same store, the
wall and CPU milliseconds of every piece (reads, kernel, write).

``--window-end`` shortens the analysis window (the synthetic surveys use
0.07 s to the end of the record, about 1.9 s); ``--chunk-traces`` and
``--group-traces`` replace ``ingest.chunk_traces`` and
``estimate.shot_group_traces``, to measure what larger pieces gain.
"""

from __future__ import annotations

import argparse
import multiprocessing
import os
import sys
import tempfile
import time
from collections import defaultdict
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).parent))
from bench_scaling import ProcessMonitor, task_stream_summary  # noqa: E402


# --------------------------------------------------------------------------- set-up


def with_settings(cfg, *, window_end_s: float | None = None, chunk_traces: int | None = None,
                  group_traces: int | None = None):
    """The survey's config with the analysis window end, the ingest chunk and
    the statistics group size replaced where given (validated again)."""
    from descatter.tasks.config import SurveyConfig

    doc = cfg.model_dump(mode="json")
    if window_end_s is not None:
        doc["analysis"]["window_end_s"] = float(window_end_s)
    if chunk_traces is not None:
        doc["ingest"]["chunk_traces"] = int(chunk_traces)
    if group_traces is not None:
        doc["estimate"]["shot_group_traces"] = int(group_traces)
    return SurveyConfig.model_validate(doc)


def window_layout(cfg, dt_s: float) -> dict:
    """Where the analysis window's samples are, as the spectra kernel finds them."""
    from descatter.flows.estimate import spectra_params
    from descatter.tasks.moveout import taper_at, window_samples

    p = spectra_params(cfg, dt_s=dt_s)
    first, count = window_samples(dt_s=dt_s, start_s=p["window_s"][0], end_s=p["window_s"][1])
    weight = taper_at((first + np.arange(count)) * dt_s, start_s=p["window_s"][0], end_s=p["window_s"][1],
                      taper_s=p["taper_s"]).astype(np.float32)
    return {"params": p, "first": first, "count": count, "weight": weight, "n_fft": p["n_fft"]}


def load_traces(store_path: Path) -> list[np.ndarray]:
    from descatter.storage.store import SurveyStore

    store = SurveyStore.open(store_path)
    return [store.array(name, "traces")[:] for name in store.swath_names()]


# --------------------------------------------------------------------------- the FFT floor


def fft_floor_seconds(blocks: list[np.ndarray], layout: dict, *, library: str = "scipy",
                      repeat: int = 3) -> tuple[float, float]:
    """(wall, CPU) seconds of the best of ``repeat``: taper and rfft of every block's analysis window, one thread."""
    import scipy.fft as sfft

    first, count, n_fft, w = layout["first"], layout["count"], layout["n_fft"], layout["weight"]
    best = (np.inf, np.inf)
    for _ in range(repeat):
        t, c = time.perf_counter(), time.process_time()
        for b in blocks:
            seg = b[:, first:first + count] * w
            if library == "scipy":
                sfft.rfft(seg, n=n_fft, axis=-1, workers=1)
            else:
                np.fft.rfft(seg, n=n_fft, axis=-1)
        best = min(best, (time.perf_counter() - t, time.process_time() - c))
    return best


def _floor_child(store_path, part, n_parts, layout, chunk, repeat, barrier, queue) -> None:
    traces = np.concatenate(load_traces(Path(store_path)))
    rows = np.array_split(np.arange(len(traces)), n_parts)[part]
    mine = traces[rows]
    blocks = [mine[a:a + chunk] for a in range(0, len(mine), chunk)]
    fft_floor_seconds(blocks, layout, repeat=1)  # FFT plans made before the clock starts
    barrier.wait()
    queue.put(fft_floor_seconds(blocks, layout, repeat=repeat))


def parallel_fft_floor_seconds(store_path: Path, layout: dict, *, processes: int, chunk: int,
                               repeat: int = 3) -> tuple[float, float]:
    """(wall, CPU) seconds of the FFT floor split over ``processes`` processes that start
    together after a barrier (each its best of ``repeat``; the slowest process's wall, the
    sum of their CPU)."""
    ctx = multiprocessing.get_context("spawn")
    barrier, queue = ctx.Barrier(processes), ctx.Queue()
    procs = [ctx.Process(target=_floor_child, args=(str(store_path), i, processes, layout, chunk, repeat, barrier,
                                                    queue)) for i in range(processes)]
    for p in procs:
        p.start()
    seconds = [queue.get(timeout=600) for _ in procs]
    for p in procs:
        p.join()
    return max(w for w, _ in seconds), sum(c for _, c in seconds)


# --------------------------------------------------------------------------- the statistics tasks' inputs


def stats_inputs(store, cfg) -> list[dict]:
    """Per swath, the arguments run_statistics gives its statistics tasks, formed the same way:
    receiver-pair groups (rows, shot, receiver), source-pair groups (rows, source, receiver),
    log-power chunks, and for each earlier swath with source pairs across, the sides of each
    receiver group (``between``)."""
    from descatter.flows.estimate import StatsReport, _between, _groups, _present, _side, _subset, allowed_pairs
    from descatter.storage.stations import read_qc_flags, read_stations, read_swath_geometry
    from descatter.tasks.log_power import offset_bins
    from descatter.tasks.trace_qc import usable_traces

    est = cfg.estimate
    src, rcv = read_stations(store, "sources"), read_stations(store, "receivers")
    records = store.manifest()
    geoms = {r.name: read_swath_geometry(store, r.name, ["shot", "source_index", "receiver_index", "offset"])
             for r in records}
    for name, g in geoms.items():
        g["live"] = usable_traces(read_qc_flags(store, name), g["source_index"], g["receiver_index"],
                                  exclude_bits=cfg.qc.exclude_bits())
    report = StatsReport()
    present = {kind: _present(geoms, f"{kind}_index", len(table["x"])) for kind, table in
               (("source", src), ("receiver", rcv))}
    rpairs = allowed_pairs(rcv["x"], rcv["y"], radius_m=est.receiver_radius_m, bridge=est.bridge_components,
                           kind="receivers", report=report, present=present["receiver"])
    spairs = allowed_pairs(src["x"], src["y"], radius_m=est.source_radius_m, bridge=est.bridge_components,
                           kind="sources", report=report, present=present["source"])
    out = []
    for i, rec in enumerate(records):
        g = geoms[rec.name]
        srcs = np.unique(g["source_index"][g["source_index"] >= 0])
        rcvs = np.unique(g["receiver_index"][g["receiver_index"] >= 0])
        shot_groups = []
        for shots in _groups(g["shot"], est.shot_group_traces):
            rows = np.flatnonzero(np.isin(g["shot"], shots) & g["live"])
            shot_groups.append((rows, g["shot"][rows], g["receiver_index"][rows]))
        bins = offset_bins(g["offset"], bin_m=est.offset_bin_m)
        sw = {
            "name": rec.name, "geometry": g, "bounds": rec.chunk_bounds(),
            "delay_s": store.array(rec.name, "headers/delay_ms")[:] * 1e-3,
            "rp": _subset(rpairs, rcvs), "sp": _subset(spairs, srcs), "shot_groups": shot_groups,
            "receiver_groups": [_side(g, np.isin(g["receiver_index"], recv)) for recv in
                                _groups(g["receiver_index"][g["receiver_index"] >= 0], est.shot_group_traces)],
            "chunks": [(a, b, g["source_index"][a:b], g["receiver_index"][a:b], bins[a:b], g["live"][a:b])
                       for a, b in rec.chunk_bounds()],
            "sizes": {"sources": int(srcs.max()) + 1, "receivers": int(rcvs.max()) + 1,
                      "offset_bins": int(offset_bins(g["offset"].max(), bin_m=est.offset_bin_m)) + 1},
            "between": [],
        }
        for prev in records[:i]:
            gp = geoms[prev.name]
            between = _between(spairs, np.unique(gp["source_index"][gp["source_index"] >= 0]), srcs)
            common = np.intersect1d(gp["receiver_index"][gp["receiver_index"] >= 0], rcvs)
            if len(between) and len(common):
                sw["between"].append({"prev": prev.name, "pairs": between, "sides": [
                    (_side(gp, np.isin(gp["receiver_index"], recv)), _side(g, np.isin(g["receiver_index"], recv)))
                    for recv in _groups(common, est.shot_group_traces)]})
        out.append(sw)
    return out


# --------------------------------------------------------------------------- the kernels alone


def kernel_seconds(cfg, layout: dict, traces: list[np.ndarray], inputs: list[dict]) -> dict:
    """The spectra and statistics kernels on the same pieces as the tasks, one process, data in
    memory (the spectra kept for the statistics kernels): {kernel: (wall, CPU) seconds}."""
    from descatter.tasks.log_power import log_power, log_power_sums
    from descatter.tasks.pairs import receiver_pair_sums, source_pair_sums, source_pair_sums_between
    from descatter.tasks.spectra import windowed_spectra

    p = layout["params"]
    sec = Tally()
    spectra = {}
    for tr, sw in zip(traces, inputs):
        g = sw["geometry"]
        t = sec.start()
        spectra[sw["name"]] = np.concatenate([windowed_spectra(
            tr[a:b], offset_m=g["offset"][a:b], delay_s=sw["delay_s"][a:b], dt_s=p["dt_s"],
            velocity_t0_s=np.asarray(p["velocity_t0_s"]), velocity_vrms_mps=np.asarray(p["velocity_vrms_mps"]),
            window_s=p["window_s"], taper_s=p["taper_s"], stretch_mute=p["stretch_mute"], n_fft=p["n_fft"],
            band_hz=p["band_hz"], moveout=p["moveout"], lmo_velocity_mps=p["lmo_velocity_mps"])
            for a, b in sw["bounds"]])
        sec.stop("spectra", t)
    for sw in inputs:
        d = spectra[sw["name"]]
        t = sec.start()
        for rows, shot, receiver in sw["shot_groups"]:
            receiver_pair_sums(d[rows], shot=shot, receiver=receiver, pairs=sw["rp"])
        sec.stop("receiver_pairs", t)
        t = sec.start()
        for rows, source, receiver in sw["receiver_groups"]:
            source_pair_sums(d[rows], shot_source=source, receiver=receiver, pairs=sw["sp"])
        sec.stop("source_pairs", t)
        t = sec.start()
        for x in sw["between"]:
            for (ra, ia, qa), (rb, ib, qb) in x["sides"]:
                source_pair_sums_between(spectra[x["prev"]][ra], d[rb], shot_source_a=ia, receiver_a=qa,
                                         shot_source_b=ib, receiver_b=qb, pairs=x["pairs"])
        sec.stop("source_pairs_between", t)
        t = sec.start()
        for a, b, source, receiver, bins, live in sw["chunks"]:
            log_power_sums(log_power(d[a:b]), source=np.maximum(source, 0), receiver=np.maximum(receiver, 0),
                           offset_bin=bins, n_sources=sw["sizes"]["sources"], n_receivers=sw["sizes"]["receivers"],
                           n_offset_bins=sw["sizes"]["offset_bins"], live=live)
        sec.stop("log_power", t)
    return sec.totals()


# --------------------------------------------------------------------------- the chunk functions, piece by piece


class Tally:
    """Wall and CPU (this process) seconds summed per label."""

    def __init__(self):
        self.wall: dict[str, float] = defaultdict(float)
        self.cpu: dict[str, float] = defaultdict(float)

    @staticmethod
    def start() -> tuple[float, float]:
        return time.perf_counter(), time.process_time()

    def stop(self, key: str, started: tuple[float, float]) -> None:
        self.wall[key] += time.perf_counter() - started[0]
        self.cpu[key] += time.process_time() - started[1]

    def totals(self, per: float = 1.0) -> dict[str, tuple[float, float]]:
        return {k: (self.wall[k] / per, self.cpu[k] / per) for k in self.wall}


def _timed(sec: Tally, key: str, fn):
    t = sec.start()
    out = fn()
    sec.stop(key, t)
    return out


def chunk_breakdown(store_path: Path, cfg, layout: dict, inputs: list[dict], calls: int = 3) -> tuple[dict, dict]:
    """Per chunk function: wall and CPU seconds per call of the whole function (called in-process
    on the store, arguments as run_statistics forms them) and of its pieces (the storage calls and
    the kernel it makes), over the first ``calls`` chunks / groups of swath 1 (of swath 2 for the
    source pairs across swaths 1 and 2). Returns (pieces, spectra rows read per call)."""
    from descatter.flows import estimate as fe
    from descatter.storage.estimation import read_spectra, write_spectra_chunk, write_stats
    from descatter.storage.checkpoints import Checkpoints
    from descatter.storage.store import SurveyStore
    from descatter.tasks.log_power import log_power, log_power_sums
    from descatter.tasks.moveout import _nmo_segment
    from descatter.tasks.pairs import receiver_pair_sums, source_pair_sums, source_pair_sums_between
    from descatter.tasks.spectra import windowed_spectra

    p = layout["params"]
    sw = inputs[0]
    name = sw["name"]
    path = str(store_path)
    out, rows_read = {}, {}

    sec = Tally()
    bounds = sw["bounds"][:calls]
    for i, (a, b) in enumerate(bounds):
        # a fingerprint of its own: the chunk is redone (same samples, same spectra)
        _timed(sec, "the whole spectra_chunk", lambda: fe.spectra_chunk(path, name, i, a, b, p, f"bench{i:027d}"))
        store = _timed(sec, "open store", lambda: SurveyStore.open(path))
        traces = _timed(sec, "read traces", lambda: store.array(name, "traces")[a:b])
        offset = _timed(sec, "read offset, delay", lambda: store.array(name, "geometry/offset")[a:b])
        delay = _timed(sec, "read offset, delay", lambda: store.array(name, "headers/delay_ms")[a:b] * 1e-3)
        spectra = _timed(sec, "kernel windowed_spectra", lambda: windowed_spectra(
            traces, offset_m=offset, delay_s=delay, dt_s=p["dt_s"], velocity_t0_s=np.asarray(p["velocity_t0_s"]),
            velocity_vrms_mps=np.asarray(p["velocity_vrms_mps"]), window_s=p["window_s"], taper_s=p["taper_s"],
            stretch_mute=p["stretch_mute"], n_fft=p["n_fft"], band_hz=p["band_hz"], moveout=p["moveout"],
            lmo_velocity_mps=p["lmo_velocity_mps"]))
        _timed(sec, "  (of which NMO resampling, _nmo_segment)", lambda: _nmo_segment(
            traces, offset_m=offset, delay_s=delay, dt_s=p["dt_s"], first=layout["first"], count=layout["count"],
            velocity_t0_s=np.asarray(p["velocity_t0_s"]), velocity_vrms_mps=np.asarray(p["velocity_vrms_mps"]),
            stretch_mute=p["stretch_mute"]))
        _timed(sec, "write spectra chunk", lambda: write_spectra_chunk(path, name, a, spectra))
        _timed(sec, "checkpoint flag", lambda: Checkpoints(path, "bench", name, "0" * 32).mark_done(a, {"seconds": 0}))
    out["spectra_chunk"] = sec.totals(len(bounds))

    sums = []  # receiver-pair sums of the first groups, for the tree-sum and write timings
    sec = Tally()
    groups = sw["shot_groups"][:calls]
    for rows, shot, receiver in groups:
        _timed(sec, "the whole receiver_pairs_task",
               lambda: fe.receiver_pairs_task(path, name, rows, shot, receiver, sw["rp"]))
        spectra = _timed(sec, "read spectra (covering range)", lambda: read_spectra(path, name, rows))
        sums.append(_timed(sec, "kernel receiver_pair_sums", lambda: receiver_pair_sums(
            spectra, shot=shot, receiver=receiver, pairs=sw["rp"])))
    out["receiver_pairs_task"] = sec.totals(max(len(groups), 1))
    rows_read["receiver_pairs_task"] = np.mean([r.max() - r.min() + 1 for r, _, _ in groups if len(r)])

    sec = Tally()
    groups = sw["receiver_groups"][:calls]
    for rows, source, receiver in groups:
        _timed(sec, "the whole source_pairs_task",
               lambda: fe.source_pairs_task(path, name, rows, source, receiver, sw["sp"]))
        spectra = _timed(sec, "read spectra (covering range)", lambda: read_spectra(path, name, rows))
        _timed(sec, "kernel source_pair_sums", lambda: source_pair_sums(
            spectra, shot_source=source, receiver=receiver, pairs=sw["sp"]))
    out["source_pairs_task"] = sec.totals(max(len(groups), 1))
    rows_read["source_pairs_task"] = np.mean([r.max() - r.min() + 1 for r, _, _ in groups if len(r)])

    second = inputs[1]["between"][:1] if len(inputs) > 1 else []
    if second:
        sec = Tally()
        x = second[0]
        sides = x["sides"][:calls]
        for side_a, side_b in sides:
            _timed(sec, "the whole source_pairs_between_task", lambda: fe.source_pairs_between_task(
                path, x["prev"], inputs[1]["name"], side_a, side_b, x["pairs"]))
            sa = _timed(sec, "read spectra (covering ranges, both swaths)", lambda: read_spectra(path, x["prev"], side_a[0]))
            sb = _timed(sec, "read spectra (covering ranges, both swaths)",
                        lambda: read_spectra(path, inputs[1]["name"], side_b[0]))
            _timed(sec, "kernel source_pair_sums_between", lambda: source_pair_sums_between(
                sa, sb, shot_source_a=side_a[1], receiver_a=side_a[2], shot_source_b=side_b[1],
                receiver_b=side_b[2], pairs=x["pairs"]))
        out["source_pairs_between_task"] = sec.totals(len(sides))
        rows_read["source_pairs_between_task"] = np.mean([len(a[0]) + len(b[0]) for a, b in sides])
        rows_read["_between_groups"] = len(x["sides"])

    sec = Tally()
    chunks = sw["chunks"][:calls]
    for a, b, source, receiver, bins, live in chunks:
        _timed(sec, "the whole log_power_task", lambda: fe.log_power_task(
            path, name, a, b, source, receiver, bins, live, sw["sizes"]))
        spectra = _timed(sec, "read spectra chunk", lambda: read_spectra(path, name, slice(a, b)))
        lp = _timed(sec, "kernel log_power", lambda: log_power(spectra))
        _timed(sec, "kernel log_power_sums", lambda: log_power_sums(
            lp, source=np.maximum(source, 0), receiver=np.maximum(receiver, 0), offset_bin=bins,
            n_sources=sw["sizes"]["sources"], n_receivers=sw["sizes"]["receivers"],
            n_offset_bins=sw["sizes"]["offset_bins"], live=live))
    out["log_power_task"] = sec.totals(len(chunks))

    # a tree-sum step and the write of a reduced statistic, on the receiver-pair sums above
    sec = Tally()
    total = sums[0]
    for part in sums[1:]:
        total = _timed(sec, "add_parts (PairSums.__add__)", lambda: fe.add_parts(total, part))
    arrays = total.to_arrays()
    size = f"{len(arrays)} arrays, {sum(v.nbytes for v in arrays.values()) / 1e6:.1f} MB"
    for i in range(calls):
        _timed(sec, f"the whole write_stats_task ({size})",
               lambda: fe.write_stats_task(path, f"bench-{i}", "receiver_pairs", total, "0" * 32))
        _timed(sec, "  write_stats", lambda: write_stats(path, f"bench-again-{i}", "receiver_pairs", arrays))
    out["add_parts, write_stats_task"] = {
        k: tuple(v / (max(len(sums) - 1, 1) if k.startswith("add") else calls) for v in pair)
        for k, pair in sec.totals().items()}
    return out, rows_read


# --------------------------------------------------------------------------- the benchmark


def _ratio(a: float, b: float) -> float:
    return a / b if b > 0 else float("nan")


def timed_estimation(store_path: Path, cfg, client) -> dict:
    """run_statistics as estimate_survey drives it (writer lock, run log), with the task
    stream and the workers' and driver's CPU seconds (bench_job.ProcessMonitor)."""
    from distributed import get_task_stream

    from descatter.flows.estimate import run_statistics
    from descatter.flows.writer import store_writer
    from descatter.storage.runlog import read_runlog

    with ProcessMonitor(client) as monitor:
        with store_writer(store_path, "estimate") as (store, runlog), get_task_stream(client) as ts:
            wall, t = time.time(), time.perf_counter()
            report = run_statistics(store, cfg, client=client, runlog=runlog)
            total = time.perf_counter() - t
    marks = {f"{r['stage']}:{r['event']}": r["t"] for r in read_runlog(store_path)
             if r.get("t", 0) >= wall and r["event"] in ("start", "end")}
    windows = {"spectra": (wall, marks["spectra:end"]), "statistics": (marks["spectra:end"], marks["stats:end"])}
    return {**{k: b - a for k, (a, b) in windows.items()}, "total": total,
            "cpu": {k: sum(monitor.cpu_between(*w).values()) for k, w in windows.items()},
            "cpu_split": {k: monitor.cpu_between(*w) for k, w in windows.items()},
            "tasks": task_stream_summary(ts.data), "n_freq": len(report.freqs_hz), "jobs": len(report.stats_computed)}


def run(n_traces: int | None = 100_000, size: str | None = None, workers: int = 2, window_end_s: float | None = None,
        seed: int = 0, calls: int = 3, repeat: int = 3, chunk_traces: int | None = None,
        group_traces: int | None = None, out=sys.stdout) -> dict:
    from descatter.flows.cluster import dask_client
    from descatter.flows.ingest import ingest_swaths
    from descatter.flows.synth import write_synthetic_survey
    from descatter.storage.config_file import load_config
    from descatter.storage.store import SurveyStore

    with tempfile.TemporaryDirectory(dir=Path.cwd(), prefix="bench_estimate_") as tmp:
        tmp = Path(tmp)
        synth = write_synthetic_survey(tmp / "survey", size=size if n_traces is None else None, n_traces=n_traces,
                                       seed=seed)
        cfg = with_settings(load_config(synth.config), window_end_s=window_end_s, chunk_traces=chunk_traces,
                            group_traces=group_traces)
        load0 = os.getloadavg()[0]
        store_path = tmp / "store.zarr"
        with dask_client("local", workers=workers) as client:
            ingest_swaths(store_path, synth.files, cfg, client=client)
            est = timed_estimation(store_path, cfg, client)
        store = SurveyStore.open(store_path)
        chunk = store.manifest()[0].chunk_traces
        layout = window_layout(cfg, store.sample_interval_s)
        traces = load_traces(store_path)
        blocks = [t[a:a + chunk] for t in traces for a in range(0, len(t), chunk)]
        floor = {"scipy": fft_floor_seconds(blocks, layout, repeat=repeat),
                 "numpy": fft_floor_seconds(blocks, layout, library="numpy", repeat=repeat),
                 "parallel": parallel_fft_floor_seconds(store_path, layout, processes=workers, chunk=chunk,
                                                        repeat=repeat)}
        inputs = stats_inputs(store, cfg)
        kernels = kernel_seconds(cfg, layout, traces, inputs)
        pieces, rows_read = chunk_breakdown(store_path, cfg, layout, inputs, calls=calls)
        n = sum(len(t) for t in traces)
        ns = traces[0].shape[1]
        load1 = os.getloadavg()[0]
    mb = n * ns * 4 / 1e6
    stats_kernels = tuple(sum(v[i] for k, v in kernels.items() if k != "spectra") for i in (0, 1))
    both = (est["spectra"] + est["statistics"], est["cpu"]["spectra"] + est["cpu"]["statistics"])
    rows = {  # label: ((wall, CPU), cores)
        "fft floor, 1 process (scipy)": (floor["scipy"], 1),
        "fft floor, 1 process (numpy)": (floor["numpy"], 1),
        f"fft floor, {workers} processes": (floor["parallel"], workers),
        "kernel windowed_spectra, 1 process": (kernels["spectra"], 1),
        "kernels: pair + log-power sums, 1 process": (stats_kernels, 1),
        f"spectra stage, {workers} workers": ((est["spectra"], est["cpu"]["spectra"]), workers),
        f"statistics stage, {workers} workers": ((est["statistics"], est["cpu"]["statistics"]), workers),
        f"spectra + statistics, {workers} workers": (both, workers),
    }
    a = cfg.analysis
    print(f"estimate benchmark: {n} traces x {ns} samples ({mb:.0f} MB), window {a.window_start_s:g}-"
          f"{a.window_end_s:g} s ({layout['count']} samples), n_fft {layout['n_fft']}, {est['n_freq']} band bins, "
          f"{workers} worker(s), chunks of {chunk} traces, statistics groups of {cfg.estimate.shot_group_traces} "
          f"traces; load average {load0:.1f} -> {load1:.1f}", file=out)
    print(f"{'':<44}{'wall s':>8}{'MB/s':>7}{'/ floor':>9}{'CPU s':>8}{'/ floor CPU':>13}", file=out)
    for label, ((wall, cpu), cores) in rows.items():
        ref = floor["scipy"] if cores == 1 else floor["parallel"]
        print(f"{label:<44}{wall:>8.2f}{_ratio(mb, wall):>7.0f}{_ratio(wall, ref[0]):>9.2f}{cpu:>8.2f}"
              f"{_ratio(cpu, ref[1]):>13.2f}", file=out)
    # the ideal floor on the cores: one process's FFT seconds shared out evenly (the measured
    # many-process floor also pays for fresh processes' page faults, so it is no floor)
    ratio = _ratio(both[0], floor["scipy"][0] / workers)
    cpu_ratio = _ratio(both[1], floor["scipy"][1])
    kernel_cpu = kernels["spectra"][1] + stats_kernels[1]
    print(f"estimation / FFT floor = {ratio:.1f} in wall seconds on {workers} cores (the 1-process floor / {workers}; "
          f"{_ratio(both[0], floor['parallel'][0]):.1f} against the measured {workers}-process floor), "
          f"{cpu_ratio:.1f} in CPU seconds (target <= 2); the kernels alone are {_ratio(kernel_cpu, floor['scipy'][1]):.1f}"
          f" x the floor and the chain {_ratio(both[1], kernel_cpu):.1f} x the kernels, in CPU seconds", file=out)
    print("CPU seconds of the stages, workers / driver: " + ", ".join(
        f"{k} {v['workers_cpu']:.2f} / {v['driver_cpu']:.2f}" for k, v in est["cpu_split"].items()), file=out)
    print("kernels alone, 1 process (wall / CPU s): " + ", ".join(
        f"{k} {w:.2f}/{c:.2f}" for k, (w, c) in kernels.items()), file=out)
    print(f"{'chunk function (Dask task stream)':<36}{'calls':>7}{'compute s':>11}{'ms/call':>9}{'transfer s':>12}",
          file=out)
    for k, r in sorted(est["tasks"].items(), key=lambda kv: -kv[1]["compute"]):
        print(f"{k:<36}{r['calls']:>7}{r['compute']:>11.2f}{1e3 * r['compute'] / max(r['calls'], 1):>9.1f}"
              f"{r['transfer']:>12.2f}", file=out)
    print(f"pieces of a call, in-process, mean of {calls} calls on swath 1 (wall ms, CPU ms):", file=out)
    for task, piece in pieces.items():
        extra = rows_read.get(task)
        note = f" ({extra:.0f} spectra rows read per call)" if extra is not None else ""
        if task == "source_pairs_between_task":
            note = (f" (swaths 1 and 2: {rows_read['_between_groups']} receiver group(s) for their common receivers, "
                    f"{extra:.0f} spectra rows per call)")
        print(f"  {task}{note}", file=out)
        for k, (w, c) in piece.items():
            print(f"    {k:<52}{1e3 * w:>9.1f}{1e3 * c:>9.1f}", file=out)
    out.flush()
    return {"rows": {k: v[0] for k, v in rows.items()}, "ratio": ratio, "cpu_ratio": cpu_ratio,
            "kernel_ratio": _ratio(both[1], kernel_cpu), "floor": floor,
            "kernels": kernels, "estimation": est, "pieces": pieces, "traces": n, "n_fft": layout["n_fft"],
            "window_samples": layout["count"]}


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--traces", type=int, default=100_000, help="about this many traces (0: use --size)")
    ap.add_argument("--size", default=None, help="a synthetic preset (tiny, demo) when --traces is 0")
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--window-end", type=float, default=None, help="analysis window end, s (default: the survey's)")
    ap.add_argument("--calls", type=int, default=3, help="calls per chunk function in the piece-by-piece timing")
    ap.add_argument("--repeat", type=int, default=3, help="best of this many FFT-floor runs")
    ap.add_argument("--chunk-traces", type=int, default=None, help="ingest.chunk_traces (default: the config's)")
    ap.add_argument("--group-traces", type=int, default=None,
                    help="estimate.shot_group_traces (default: the config's)")
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args(argv)
    run(args.traces or None, args.size, args.workers, args.window_end, args.seed, args.calls, args.repeat,
        args.chunk_traces, args.group_traces)


if __name__ == "__main__":
    main()
