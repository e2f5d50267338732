"""Correction: a solution's station filters applied to every trace, chunk by chunk.

Each Dask task reads one chunk of traces, builds each trace's correction
from its source and receiver station filters (on the FFT grid of the whole
trace length), applies it, and writes the matching chunk of ``corrected``,
then its done-flag. Dead and excluded traces pass through untouched; so do
traces whose two stations have identity filters. The effective settings are
recorded with each swath's corrected array.
"""

from __future__ import annotations

import hashlib
import json
import logging
import time
from pathlib import Path

import numpy as np

from descatter.flows.writer import store_writer
from descatter.storage.checkpoints import Checkpoints
from descatter.storage.estimation import corrected_settings, create_corrected, read_solution, write_corrected_chunk
from descatter.storage.faults import fault_point
from descatter.storage.store import SurveyStore
from descatter.tasks.config import SurveyConfig
from descatter.tasks.correction import (
    apply_correction, band_to_full_grid, correction_n_fft, filter_spectra, grid_band_weight, trace_correction,
)
from descatter.tasks.trace_qc import usable_traces

log = logging.getLogger(__name__)

STAGE = "apply"
STAGE_VERSION = 1
SOLUTION_ARRAYS = ("source_filter", "receiver_filter", "source_identity", "receiver_identity")


def _station_grid(solution: dict, kind: str, rows: np.ndarray, *, lead_s: float, dt_s: float, n_fft: int,
                  band_index: np.ndarray, taper_bins: int) -> np.ndarray:
    """Responses of the given stations on the correction grid: the filter's
    spectrum in the band, identity outside (and for identity stations)."""
    h = filter_spectra(solution[f"{kind}_filter"][rows], lead_s=lead_s, dt_s=dt_s, n_fft=n_fft)
    grid = band_to_full_grid(h[:, band_index], band_index=band_index, n_rfft=n_fft // 2 + 1, taper=taper_bins)
    grid[solution[f"{kind}_identity"][rows]] = 1.0
    return grid


def correct_traces(sol: dict, attrs: dict, settings: dict, traces: np.ndarray, si: np.ndarray, ri: np.ndarray,
                   passthrough: np.ndarray) -> np.ndarray:
    """The corrected samples of ``traces`` (rows of one chunk) from the
    solution's station filters; ``passthrough`` rows come back untouched."""
    n_fft = settings["n_fft"]
    dt = attrs["dt_s"]
    band_index = np.asarray(settings["band_index"], np.int64)
    us, s_inv = np.unique(np.maximum(si, 0), return_inverse=True)
    ur, r_inv = np.unique(np.maximum(ri, 0), return_inverse=True)
    common = dict(lead_s=settings["lead_s"], dt_s=dt, n_fft=n_fft, band_index=band_index,
                  taper_bins=settings["taper_bins"])
    s_grid = _station_grid(sol, "source", us, **common)
    r_grid = _station_grid(sol, "receiver", ur, **common)
    weight = grid_band_weight(band_index=band_index, n_rfft=n_fft // 2 + 1, taper=settings["taper_bins"])
    correction = trace_correction(s_grid, r_grid, s_inv.reshape(-1), r_inv.reshape(-1), mode=settings["mode"],
                                  prewhitening=settings["prewhitening"], band_weight=weight)
    return apply_correction(traces, correction, n_fft=n_fft, passthrough=passthrough)


def apply_chunk(store_path: str, swath: str, chunk: int, start: int, stop: int, solution_id: str,
                settings: dict, fingerprint: str) -> dict:
    """One chunk: corrected traces written, then the flag. Idempotent."""
    ckpt = Checkpoints(store_path, STAGE, swath, fingerprint)
    if ckpt.is_done(chunk):
        return {"chunk": chunk, "traces": stop - start, "resumed": True, "seconds": 0.0, "passed": 0}
    t0 = time.perf_counter()
    store = SurveyStore.open(store_path)
    # only what this chunk needs: its own rows and the filters, not the whole solution
    _, sol, attrs = read_solution(store, solution_id, names=SOLUTION_ARRAYS)
    traces = store.array(swath, "traces")[start:stop]
    si = store.array(swath, "geometry/source_index")[start:stop]
    ri = store.array(swath, "geometry/receiver_index")[start:stop]
    flags = store.array(swath, "qc_flags")[start:stop]
    passthrough = ~usable_traces(flags, si, ri, exclude_bits=settings["exclude_bits"])
    passthrough |= sol["source_identity"][np.maximum(si, 0)] & sol["receiver_identity"][np.maximum(ri, 0)]
    corrected = correct_traces(sol, attrs, settings, traces, si, ri, passthrough)
    write_corrected_chunk(store_path, swath, start, corrected)
    summary = {"seconds": time.perf_counter() - t0, "passed": int(passthrough.sum())}
    ckpt.mark_done(chunk, summary)
    return {"chunk": chunk, "traces": stop - start, "resumed": False, **summary}


def correction_settings(store: SurveyStore, solution_id: str, attrs: dict, sol: dict, config: SurveyConfig) -> dict:
    """Plain numbers the chunk tasks need, also recorded with the output."""
    dt = attrs["dt_s"]
    n_taps = sol["source_filter"].shape[1]
    n_fft = correction_n_fft(store.n_samples, filter_samples=2 * n_taps)
    f = np.fft.rfftfreq(n_fft, dt)
    lo, hi = attrs["config"]["analysis"]["band_hz"]
    band_index = np.flatnonzero((f >= lo) & (f <= hi))
    c = config.correction
    return {
        "solution": solution_id, "mode": c.mode, "prewhitening": c.prewhitening,
        "band_hz": [lo, hi], "band_taper_hz": c.band_taper_hz,
        "taper_bins": int(round(c.band_taper_hz / (f[1] - f[0]))), "n_fft": int(n_fft),
        "band_index": band_index.tolist(), "lead_s": attrs["config"]["estimate"]["filter_lead_s"],
        "exclude_bits": int(config.qc.exclude_bits()),
    }


def apply_solution(store_path: str | Path, config: SurveyConfig, *, client, solution: str | None = None,
                   progress=None) -> dict:
    """Correct every committed swath with a solution (default: the current one)."""
    from distributed import as_completed

    t0 = time.perf_counter()
    with store_writer(store_path, "apply") as (store, runlog):
        sid, sol, attrs = read_solution(store, solution)
        settings = correction_settings(store, sid, attrs, sol, config)
        records = store.manifest()
        futures = []
        for rec in records:
            fp = hashlib.blake2b(json.dumps({"v": STAGE_VERSION, "swath": rec.fingerprint, **settings},
                                            sort_keys=True).encode(), digest_size=16).hexdigest()
            if (corrected_settings(store, rec.name) or {}).get("fingerprint") != fp:
                create_corrected(store, rec.name, settings={k: v for k, v in settings.items() if k != "band_index"}
                                 | {"fingerprint": fp})
                Checkpoints(store.path, STAGE, rec.name, fp).clear()
            for chunk, (a, b) in enumerate(rec.chunk_bounds()):
                futures.append(client.submit(apply_chunk, str(store.path), rec.name, chunk, a, b, sid, settings, fp,
                                             key=f"apply-{rec.name}-{chunk}-{fp[:8]}", pure=False))
        runlog.write(STAGE, "start", solution=sid, chunks=len(futures), mode=settings["mode"],
                     prewhitening=settings["prewhitening"])
        total = sum(r.n_traces for r in records)
        done = resumed = passed = 0
        for fut in as_completed(futures):
            s = fut.result()
            done += s["traces"]
            resumed += s["resumed"]
            passed += s["passed"]
            runlog.write(STAGE, "batch", chunk=s["chunk"], traces=s["traces"], seconds=round(s["seconds"], 4),
                         resumed=s["resumed"])
            if progress:
                progress("apply", done, total)
            if not s["resumed"]:
                fault_point(STAGE)
        seconds = time.perf_counter() - t0
        runlog.write(STAGE, "end", solution=sid, traces=total, passed_through=passed, seconds=round(seconds, 3))
        return {"solution": sid, "traces": total, "passed_through": passed, "resumed_chunks": resumed,
                "seconds": seconds, "settings": settings}
