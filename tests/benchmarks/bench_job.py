"""The whole job against a single-process program that does the same math in memory.

    python tests/benchmarks/bench_job.py [--size demo | --traces N] [--workers 2] [--seed 0] [--profile]

Writes a synthetic survey (``descatter synth``), warms the page cache with
one read of its SEG-Y files, then runs, on the same files and config:

- descatter: ingest -> estimate -> apply -> export (one SEG-Y per swath)
  on a local Dask cluster of ``--workers`` processes (cluster start-up timed
  apart, not in the job);
- a single-process program a user could write without the store: segyio
  reads every swath into memory, numpy (through the pure kernels of
  ``descatter.tasks``) computes geometry, QC, spectra, pair and log-power
  sums of the whole survey at once, the solves, the station filters and the
  correction, and segyio writes corrected copies of the input files. It runs
  in a fresh process so its peak memory is its own (VmHWM from
  /proc/self/status; ``getrusage``'s ``ru_maxrss`` where there is no /proc).

Prints wall and CPU seconds per stage for both and their ratios (CPU
seconds move less than wall seconds when other processes share the cores),
peak memory (the program's peak RSS; for descatter the largest worker RSS
and the driver RSS, sampled with psutil every 50 ms, and the workers' own
peak RSS), and whether the two corrected outputs agree: the correlation of
every pair of corrected traces and their relative RMS difference, against
``CORRELATION_TOLERANCE`` and ``RELATIVE_RMS_TOLERANCE``. ``--profile``
adds the Dask task stream per chunk function, a cProfile of the driver per
stage and the pieces of ``apply_chunk`` timed in-process.
"""

from __future__ import annotations

import argparse
import multiprocessing
import os
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).parent))
from bench_scaling import (  # noqa: E402
    ProcessMonitor, apply_breakdown, descatter_job, disk_mb, driver_profile_text, peak_rss_mb, warm_page_cache,
    worker_peak_rss_mb,
)

# Both programs run the same kernels on the same float32 samples; they differ
# in the order of the sums (per-shot-group tree sums and per-swath partials
# against one sum over the survey), in float64 rounding, so the corrected
# traces agree far inside these bounds.
CORRELATION_TOLERANCE = 0.9999  # least correlation of two corrected traces
RELATIVE_RMS_TOLERANCE = 1e-3  # largest |a - b|_rms / |a|_rms over the survey


# --------------------------------------------------------------------------- the single-process program

_HEADER_FIELDS = {  # segyio names (SEG-Y rev 1 trace header)
    "field_record": "FieldRecord", "offset": "offset", "source_x": "SourceX", "source_y": "SourceY",
    "receiver_x": "GroupX", "receiver_y": "GroupY", "coordinate_scalar": "SourceGroupScalar",
    "elevation_scalar": "ElevationScalar", "source_elevation": "SourceSurfaceElevation",
    "receiver_elevation": "ReceiverGroupElevation", "delay_ms": "DelayRecordingTime",
}


def _scaled(values: np.ndarray, scalar: np.ndarray) -> np.ndarray:
    # SEG-Y rev 1, trace header bytes 69-72: a positive scalar multiplies, a negative one divides, 0 means 1
    s = scalar.astype(np.float64)
    return values.astype(np.float64) * np.where(s > 0, s, 1.0) / np.where(s < 0, -s, 1.0)


def _read_swath(path: Path) -> dict:
    import segyio

    with segyio.open(str(path), ignore_geometry=True) as f:
        f.mmap()
        traces = f.trace.raw[:].astype(np.float32, copy=False)
        h = {k: np.asarray(f.attributes(getattr(segyio.TraceField, v))[:]) for k, v in _HEADER_FIELDS.items()}
        dt_s = segyio.tools.dt(f) * 1e-6
    sw = {"traces": traces, "dt_s": dt_s, "field_record": h["field_record"].astype(np.int64),
          "header_offset": h["offset"].astype(np.float64), "delay_s": h["delay_ms"] * 1e-3}
    for k in ("source_x", "source_y", "receiver_x", "receiver_y"):
        sw[k] = _scaled(h[k], h["coordinate_scalar"])
    return sw


def _geometry(sw: dict, name: str, cfg, known: dict) -> None:
    """Station rows, shots, offsets and QC flags of one swath, in place;
    ``known`` holds the station keys and positions of earlier swaths."""
    from descatter.tasks import geometry as geo
    from descatter.tasks import trace_qc

    sx, sy, rx, ry = sw["source_x"], sw["source_y"], sw["receiver_x"], sw["receiver_y"]
    n = len(sx)
    valid = ~trace_qc.zero_xy_traces(sx, sy, rx, ry)
    keys = {}
    for kind, x, y in (("sources", sx, sy), ("receivers", rx, ry)):
        k = np.full(n, -1, np.int64)
        k[valid] = geo.station_keys(x[valid], y[valid], snap_m=cfg.geometry.snap_m)
        idx = np.full(n, -1, np.int64)
        idx[valid], new = geo.assign_stations(k[valid], known[kind]["key"])
        m = len(known[kind]["key"])
        total = m + len(new)
        ok = idx >= 0
        known[kind] = {"key": np.concatenate([known[kind]["key"], new]),
                       "x": np.concatenate([known[kind]["x"], geo.station_means(idx[ok], x[ok], n_stations=total)[m:]]),
                       "y": np.concatenate([known[kind]["y"], geo.station_means(idx[ok], y[ok], n_stations=total)[m:]])}
        keys[kind] = k
        sw[f"{kind[:-1]}_index"] = idx
    sw["shot"] = geo.shot_ids(sw["field_record"], keys["sources"])
    sw["offset"] = geo.trace_geometry(sx, sy, rx, ry)["offset"]
    flags = trace_qc.sample_flags(sw["traces"], clip_run=cfg.qc.clip_run) | trace_qc.header_flags(
        sx, sy, rx, ry, sw["header_offset"], offset_tolerance_m=cfg.geometry.offset_tolerance_m,
        duplicate=trace_qc.duplicate_traces(keys["sources"], keys["receivers"]) & valid)
    qc = cfg.qc
    flags = trace_qc.apply_exclusions(
        flags, source_key=keys["sources"], receiver_key=keys["receivers"], field_record=sw["field_record"],
        trace_index=np.arange(n), exclude_sources=qc.source_keys(cfg.geometry),
        exclude_receivers=qc.receiver_keys(cfg.geometry), exclude_field_records=qc.exclude_field_records,
        exclude_ranges=qc.trace_ranges(name))
    sw["live"] = trace_qc.usable_traces(flags, sw["source_index"], sw["receiver_index"],
                                        exclude_bits=qc.exclude_bits())


def _pairs(x, y, radius_m: float, bridge: bool) -> np.ndarray:
    from descatter.tasks.pairs import bridge_components, graph_components, neighbour_pairs

    pairs = neighbour_pairs(x, y, radius_m=radius_m)
    if bridge and graph_components(len(x), pairs)[0] > 1:
        pairs = np.unique(np.concatenate([pairs, bridge_components(x, y, pairs)[0]]), axis=0)
    return pairs


def _filters(amp, phase, pairs, n: int, freqs, est, dt_s: float, n_fft: int):
    from descatter.tasks import station_filters as sf

    identity = sf.identity_mask(sf.pair_counts(pairs.pairs, pairs.count, n), min_pairs=est.min_pairs) | phase.isolated
    response = sf.station_response(amp, phase.z)
    response[identity] = 1.0
    filt = sf.time_filters(response, freqs_hz=freqs, n_fft=n_fft, dt_s=dt_s, max_length_s=est.filter_length_s,
                           lead_s=est.filter_lead_s).astype(np.float32)
    return filt, identity


class Laps:
    """Wall and CPU seconds of consecutive laps: ``lap(label)`` closes the
    lap begun at the previous call (or at creation)."""

    def __init__(self):
        self.wall: dict[str, float] = {}
        self.cpu: dict[str, float] = {}
        self._t, self._c = time.perf_counter(), time.process_time()

    def lap(self, label: str) -> None:
        t, c = time.perf_counter(), time.process_time()
        self.wall[label] = self.wall.get(label, 0.0) + t - self._t
        self.cpu[label] = self.cpu.get(label, 0.0) + c - self._c
        self._t, self._c = t, c

    @staticmethod
    def total(d: dict[str, float]) -> dict[str, float]:
        return d | {"total": sum(d.values())}


def single_process_job(files, config_path: Path, out_dir: Path, block: int = 4096) -> dict:
    """The whole job in one process, in memory, no store; seconds per stage."""
    import segyio

    from descatter.storage.config_file import load_config
    from descatter.tasks import correction as corr
    from descatter.tasks.amplitude_solve import amplitude_solve, pair_amplitude_solve
    from descatter.tasks.log_power import log_power, log_power_sums, offset_bins
    from descatter.tasks.pairs import receiver_pair_sums, smooth_pair_sums, source_pair_sums
    from descatter.tasks.phase_sync import phase_sync
    from descatter.tasks.spectra import band_frequencies, windowed_spectra
    from descatter.tasks.statistics import coherence_totals, noise_to_signal
    from descatter.tasks.wavelets import band_taper

    cfg = load_config(config_path)
    a, est = cfg.analysis, cfg.estimate
    clock = Laps()
    swaths = [_read_swath(Path(f)) for f in files]
    clock.lap("read")

    empty = {"key": np.zeros(0, np.int64), "x": np.zeros(0), "y": np.zeros(0)}
    known = {"sources": dict(empty), "receivers": dict(empty)}
    for f, sw in zip(files, swaths):
        _geometry(sw, Path(f).stem, cfg, known)
    clock.lap("geometry")

    dt = swaths[0]["dt_s"]
    n_win = int(round((a.window_end_s - a.window_start_s) / dt)) + 1
    n_fft = a.n_fft or int(2 ** np.ceil(np.log2(max(n_win, 8))))
    v = np.asarray(a.velocity, float)
    freqs, _ = band_frequencies(n_fft=n_fft, dt_s=dt, band_hz=a.band_hz)
    for sw in swaths:
        sw["spectra"] = windowed_spectra(
            sw["traces"], offset_m=sw["offset"], delay_s=sw["delay_s"], dt_s=dt, velocity_t0_s=v[:, 0],
            velocity_vrms_mps=v[:, 1], window_s=(a.window_start_s, a.window_end_s), taper_s=a.taper_s,
            stretch_mute=a.stretch_mute, n_fft=n_fft, band_hz=a.band_hz, moveout=a.moveout,
            lmo_velocity_mps=a.lmo_velocity_mps)
    clock.lap("spectra")

    cat = {k: np.concatenate([sw[k] for sw in swaths]) for k in
           ("spectra", "source_index", "receiver_index", "offset", "live")}
    # shot ids are unique within a swath: number them over the survey
    shot = np.unique(np.concatenate([np.column_stack([np.full(len(sw["shot"]), i), sw["shot"]])
                                     for i, sw in enumerate(swaths)]), axis=0, return_inverse=True)[1].reshape(-1)
    n_src, n_rcv = len(known["sources"]["key"]), len(known["receivers"]["key"])
    rpairs = _pairs(known["receivers"]["x"], known["receivers"]["y"], est.receiver_radius_m, est.bridge_components)
    spairs = _pairs(known["sources"]["x"], known["sources"]["y"], est.source_radius_m, est.bridge_components)
    live = cat["live"]
    rp = receiver_pair_sums(cat["spectra"], shot=shot, receiver=cat["receiver_index"], pairs=rpairs, live=live)
    sp = source_pair_sums(cat["spectra"], shot_source=cat["source_index"], receiver=cat["receiver_index"],
                          pairs=spairs, live=live)
    lp = log_power_sums(
        log_power(cat["spectra"]), source=np.maximum(cat["source_index"], 0),
        receiver=np.maximum(cat["receiver_index"], 0), offset_bin=offset_bins(cat["offset"], bin_m=est.offset_bin_m),
        n_sources=int(cat["source_index"].max()) + 1, n_receivers=int(cat["receiver_index"].max()) + 1,
        n_offset_bins=int(offset_bins(cat["offset"].max(), bin_m=est.offset_bin_m)) + 1, live=live)
    clock.lap("statistics")

    # the traces' noise-to-signal ratio per frequency from the unsmoothed pair sums (the prewhitening)
    coherent, total = (a + b for a, b in zip(coherence_totals(rp.cross, rp.power_a, rp.power_b),
                                             coherence_totals(sp.cross, sp.power_a, sp.power_b)))
    nu = noise_to_signal(coherent, total)
    if est.smoothing_hz > 0 and len(freqs) > 1:
        df = float(freqs[1] - freqs[0])
        rp = smooth_pair_sums(rp, bin_hz=df, half_width_hz=est.smoothing_hz)
        sp = smooth_pair_sums(sp, bin_hz=df, half_width_hz=est.smoothing_hz)
    terms = ("source", "receiver", "offset") + (("cmp",) if est.cmp_bin_m > 0 else ())
    amp = amplitude_solve(lp, terms=terms)
    src_amp, rcv_amp = np.zeros((n_src, len(freqs))), np.zeros((n_rcv, len(freqs)))
    src_amp[: len(amp.source)] = amp.source
    rcv_amp[: len(amp.receiver)] = amp.receiver
    rcv_amp = pair_amplitude_solve(rp.pairs, rp.cross, rp.count, prior=rcv_amp)
    src_amp = pair_amplitude_solve(sp.pairs, sp.cross, sp.count, prior=src_amp)
    rph = phase_sync(rp.pairs, rp.cross, rp.coherence() * rp.count[:, None], n_stations=n_rcv,
                     method=est.phase_method)
    sph = phase_sync(sp.pairs, sp.cross, sp.coherence() * sp.count[:, None], n_stations=n_src,
                     method=est.phase_method)
    s_filter, s_identity = _filters(src_amp, sph, sp, n_src, freqs, est, dt, n_fft)
    r_filter, r_identity = _filters(rcv_amp, rph, rp, n_rcv, freqs, est, dt, n_fft)
    clock.lap("solve")

    ns = swaths[0]["traces"].shape[1]
    nc = corr.correction_n_fft(ns, filter_samples=2 * s_filter.shape[1])
    f = np.fft.rfftfreq(nc, dt)
    band = np.flatnonzero((f >= a.band_hz[0]) & (f <= a.band_hz[1]))
    taper = int(round(cfg.correction.band_taper_hz / (f[1] - f[0])))
    c = cfg.correction
    n_rfft = nc // 2 + 1

    def grid(filters, identity, rows):
        h = corr.filter_spectra(filters[rows], lead_s=est.filter_lead_s, dt_s=dt, n_fft=nc)
        g = corr.band_to_full_grid(h[:, band], band_index=band, n_rfft=n_rfft, taper=taper)
        g[identity[rows]] = 1.0
        return g

    weight = corr.grid_band_weight(band_index=band, n_rfft=n_rfft, taper=taper)
    prewhitening = c.prewhitening  # fixed, or measured per frequency as the estimate measured it
    if c.mode == "full" and c.prewhitening_mode == "measured" and np.all(np.isfinite(nu)) and len(band):
        prewhitening = corr.prewhitening_spectrum(nu, band_hz=freqs, grid_hz=f, scale=c.prewhitening_scale)
    shaping = band_taper(f, corners_hz=tuple(c.shaping_hz)) if c.shaping_hz else None  # optional target band
    # every station's response once, in single precision like the samples (as descatter does)
    s_grid = grid(s_filter, s_identity, np.arange(len(s_filter))).astype(np.complex64)
    r_grid = grid(r_filter, r_identity, np.arange(len(r_filter))).astype(np.complex64)
    for sw in swaths:
        sw["corrected"] = np.empty_like(sw["traces"])
        for b0 in range(0, len(sw["traces"]), block):
            sl = slice(b0, b0 + block)
            si, ri = np.maximum(sw["source_index"][sl], 0), np.maximum(sw["receiver_index"][sl], 0)
            skip = ~sw["live"][sl] | (s_identity[si] & r_identity[ri])
            spectrum = corr.trace_correction(s_grid, r_grid, si, ri, mode=c.mode,
                                             prewhitening=prewhitening, band_weight=weight, shaping=shaping)
            sw["corrected"][sl] = corr.apply_correction(sw["traces"][sl], spectrum, n_fft=nc, passthrough=skip)
    clock.lap("apply")

    out_dir.mkdir(parents=True, exist_ok=True)
    outputs = []
    for path, sw in zip(files, swaths):
        dst = out_dir / Path(path).name
        shutil.copyfile(path, dst)
        with segyio.open(str(dst), "r+", ignore_geometry=True) as fh:
            fh.trace[:] = sw["corrected"]
        outputs.append(dst)
    clock.lap("write")
    return {"seconds": clock.total(clock.wall), "cpu": clock.total(clock.cpu), "outputs": outputs}


def _single_process_child(files, config_path, out_dir) -> dict:
    idle = peak_rss_mb()
    result = single_process_job([Path(f) for f in files], Path(config_path), Path(out_dir))
    result["peak_rss_mb"] = peak_rss_mb()
    result["idle_mb"] = idle
    result["outputs"] = [str(p) for p in result["outputs"]]
    return result


def run_single_process(files, config_path: Path, out_dir: Path) -> dict:
    """:func:`single_process_job` in a fresh process (spawned, so its peak RSS is its own)."""
    import descatter.tasks  # noqa: F401  (the child imports the same package)

    ctx = multiprocessing.get_context("spawn")
    with ctx.Pool(1) as pool:
        # import the kernels first, so "idle" is the RSS of a process ready to work
        pool.apply(_import_kernels)
        return pool.apply(_single_process_child, ([str(f) for f in files], str(config_path), str(out_dir)))


def _import_kernels() -> None:
    import segyio  # noqa: F401

    import descatter.tasks.amplitude_solve  # noqa: F401
    import descatter.tasks.correction  # noqa: F401
    import descatter.tasks.pairs  # noqa: F401
    import descatter.tasks.phase_sync  # noqa: F401
    import descatter.tasks.spectra  # noqa: F401


# --------------------------------------------------------------------------- agreement


def compare_outputs(files_a, files_b) -> dict:
    """Per-trace correlation and the survey's relative RMS difference of two
    sets of SEG-Y files (read with segyio, files paired in order). Traces
    with no energy in either set are left out of the correlation."""
    import segyio

    corr, diff2, ref2, n = [], 0.0, 0.0, 0
    for fa, fb in zip(files_a, files_b):
        with segyio.open(str(fa), ignore_geometry=True) as a, segyio.open(str(fb), ignore_geometry=True) as b:
            a.mmap(), b.mmap()
            x, y = a.trace.raw[:].astype(np.float64), b.trace.raw[:].astype(np.float64)
        if x.shape != y.shape:
            raise ValueError(f"{fa} holds {x.shape} samples and {fb} {y.shape}: the outputs differ in shape")
        n += len(x)
        diff2 += float(np.sum((x - y) ** 2))
        ref2 += float(np.sum(x**2))
        xc, yc = x - x.mean(axis=1, keepdims=True), y - y.mean(axis=1, keepdims=True)
        den = np.sqrt(np.sum(xc**2, axis=1) * np.sum(yc**2, axis=1))
        ok = den > 0
        corr.append(np.sum(xc * yc, axis=1)[ok] / den[ok])
    c = np.concatenate(corr) if corr else np.zeros(0)
    rel = float(np.sqrt(diff2 / ref2)) if ref2 > 0 else float("nan")
    out = {"traces": n, "compared": len(c), "min_corr": float(c.min()) if len(c) else float("nan"),
           "median_corr": float(np.median(c)) if len(c) else float("nan"), "relative_rms": rel}
    out["agree"] = bool(len(c) and out["min_corr"] >= CORRELATION_TOLERANCE and rel <= RELATIVE_RMS_TOLERANCE)
    return out


# --------------------------------------------------------------------------- the benchmark

_ROWS = [  # (label, descatter stages summed, single-process stages summed)
    ("read / ingest", ("ingest",), ("read", "geometry")),
    ("spectra", ("spectra",), ("spectra",)),
    ("statistics", ("statistics",), ("statistics",)),
    ("solve", ("solve",), ("solve",)),
    ("apply", ("apply",), ("apply",)),
    ("export / write", ("export",), ("write",)),
    ("total", ("total",), ("total",)),
]


def run(n_traces: int | None = None, size: str | None = "demo", workers: int = 2, seed: int = 0,
        profile: bool = False, out=sys.stdout) -> dict:
    from descatter.flows.cluster import dask_client
    from descatter.flows.synth import write_synthetic_survey

    with tempfile.TemporaryDirectory(dir=Path.cwd(), prefix="bench_job_") as tmp:
        tmp = Path(tmp)
        t = time.perf_counter()
        synth = write_synthetic_survey(tmp / "survey", size=size if n_traces is None else None,
                                       n_traces=n_traces, seed=seed)
        t_synth = time.perf_counter() - t
        files = list(synth.files)
        warm_page_cache(files)
        load0 = os.getloadavg()[0]
        single = run_single_process(files, synth.config, tmp / "single_out")
        t = time.perf_counter()
        with dask_client("local", workers=workers) as client:
            t_cluster = time.perf_counter() - t
            with ProcessMonitor(client) as monitor:
                job = descatter_job(files, synth.config, tmp, client, monitor, profile=profile)
            worker_peak = worker_peak_rss_mb(client)
        if profile:
            from descatter.storage.config_file import load_config
            from descatter.storage.store import SurveyStore

            job["apply_pieces"] = apply_breakdown(job["store"], load_config(synth.config))
            job["chunk_traces"] = SurveyStore.open(job["store"]).manifest()[0].chunk_traces
        agreement = compare_outputs(job["outputs"], [Path(p) for p in single["outputs"]])
        disk = {"segy_in": sum(f.stat().st_size for f in files) / 1e6, "store": disk_mb(job["store"])}

    d, s = job["seconds"], single["seconds"]
    windows = monitor.windows | job["windows"]
    windows["total"] = (windows["ingest"][0], windows["export"][1])
    d_cpu = {k: sum(monitor.cpu_between(*w).values()) for k, w in windows.items()}
    s_cpu = single["cpu"]

    def summed(values: dict, keys) -> float:
        return sum(values[k] for k in keys)

    rows = {label: {"descatter": summed(d, dk), "single": summed(s, sk), "descatter_cpu": summed(d_cpu, dk),
                    "single_cpu": summed(s_cpu, sk)} for label, dk, sk in _ROWS}
    mb_in = disk["segy_in"]
    print(f"job benchmark: {synth.traces} traces x {synth.spec.n_samples} samples in {len(files)} swaths "
          f"({mb_in:.0f} MB of SEG-Y; synth {t_synth:.1f} s), descatter on {workers} Dask worker(s) "
          f"(cluster start {t_cluster:.1f} s, not counted), single process on 1 core; load average "
          f"{load0:.1f} -> {os.getloadavg()[0]:.1f}", file=out)
    print(f"{'stage':<16}{'descatter s':>13}{'single s':>10}{'ratio':>7}{'descatter CPU s':>17}"
          f"{'single CPU s':>14}{'CPU ratio':>11}", file=out)
    for label, r in rows.items():
        ratio = r["descatter"] / r["single"] if r["single"] > 0 else float("nan")
        cpu_ratio = r["descatter_cpu"] / r["single_cpu"] if r["single_cpu"] > 0 else float("nan")
        print(f"{label:<16}{r['descatter']:>13.2f}{r['single']:>10.2f}{ratio:>7.2f}{r['descatter_cpu']:>17.2f}"
              f"{r['single_cpu']:>14.2f}{cpu_ratio:>11.2f}", file=out)
    print("  (descatter CPU: its workers and driver; the estimate's parts split by its run-log records)", file=out)
    print(f"throughput: descatter {mb_in / d['total']:.1f} MB/s, single process {mb_in / s['total']:.1f} MB/s "
          f"(SEG-Y in over total seconds); store on disk {disk['store']:.0f} MB", file=out)
    peaks = monitor.peaks
    print("peak memory (MB): single process peak RSS (VmHWM) "
          f"{single['peak_rss_mb']:.0f} (idle {single['idle_mb']:.0f}); descatter largest worker RSS "
          f"{max(p['worker_mb'] for p in peaks.values()):.0f} (idle {monitor.idle['worker_mb']:.0f}, workers' "
          f"VmHWM {worker_peak:.0f}), all workers {max(p['workers_mb'] for p in peaks.values()):.0f}, "
          f"driver {max(p['driver_mb'] for p in peaks.values()):.0f}", file=out)
    print("  per stage, largest worker / driver: " + ", ".join(
        f"{k} {p['worker_mb']:.0f}/{p['driver_mb']:.0f}" for k, p in peaks.items()), file=out)
    a = agreement
    print(f"outputs agree: {'yes' if a['agree'] else 'NO'} - {a['compared']} of {a['traces']} traces compared, "
          f"correlation min {a['min_corr']:.6f} median {a['median_corr']:.6f} (tolerance >= "
          f"{CORRELATION_TOLERANCE}), relative RMS difference {a['relative_rms']:.2e} (tolerance <= "
          f"{RELATIVE_RMS_TOLERANCE:g})", file=out, flush=True)
    if profile:
        print(f"{'chunk function (Dask task stream)':<36}{'calls':>7}{'compute s':>11}{'ms/call':>9}{'transfer s':>12}",
              file=out)
        for k, r in sorted(job["tasks"].items(), key=lambda kv: -kv[1]["compute"]):
            print(f"{k:<36}{r['calls']:>7}{r['compute']:>11.2f}{1e3 * r['compute'] / max(r['calls'], 1):>9.1f}"
                  f"{r['transfer']:>12.2f}", file=out)
        for name, prof in job["profiles"].items():
            print(f"driver profile, {name} (descatter functions by cumulative seconds):", file=out)
            print(driver_profile_text(prof), file=out)
        print(f"pieces of apply_chunk, in-process, mean of 3 chunks (wall ms, CPU ms; {job['chunk_traces']} traces):",
              file=out)
        for k, (w, c) in job["apply_pieces"].items():
            print(f"    {k:<56}{1e3 * w:>9.1f}{1e3 * c:>9.1f}", file=out)
        out.flush()
    return {"rows": rows, "descatter": d, "single": s, "descatter_cpu": d_cpu, "single_cpu": s_cpu,
            "agreement": agreement, "cluster_s": t_cluster,
            "memory": {"peaks": peaks, "idle": monitor.idle, "worker_peak_rss_mb": worker_peak,
                       "single_peak_rss_mb": single["peak_rss_mb"], "single_idle_mb": single["idle_mb"]},
            "traces": synth.traces, "disk_mb": disk}


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--traces", type=int, default=0, help="about this many traces (0: use --size)")
    ap.add_argument("--size", default="demo", help="a synthetic preset (tiny, demo: 28,800 traces) when --traces is 0")
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--profile", action="store_true",
                    help="also print the Dask task stream per chunk function and a cProfile of the driver per stage")
    args = ap.parse_args(argv)
    run(args.traces or None, args.size, args.workers, args.seed, args.profile)


if __name__ == "__main__":
    main()
