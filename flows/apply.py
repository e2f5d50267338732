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
import uuid
from pathlib import Path

import numpy as np

from descatter.flows.cluster import map_chunks
from descatter.flows.writer import store_writer
from descatter.storage.checkpoints import Checkpoints
from descatter.storage.estimation import (
    corrected_settings, corrected_solution_index, create_corrected, list_solutions, mark_corrected_solution,
    read_corrected_chunk, read_solution,
    write_corrected_chunk,
)
from descatter.storage.faults import fault_point
from descatter.storage.store import SurveyStore
from descatter.tasks.config import SurveyConfig
from descatter.tasks.correction import (
    apply_correction, band_to_full_grid, correction_n_fft, filter_spectra, grid_band_weight, trace_correction,
)
from descatter.tasks.correction import prewhitening_spectrum
from descatter.tasks.station_filters import filter_change
from descatter.tasks.trace_qc import usable_traces
from descatter.tasks.wavelets import band_taper

log = logging.getLogger(__name__)

STAGE = "apply"
STAGE_VERSION = 2  # 2: single-precision correction
SOLUTION_ARRAYS = ("source_filter", "receiver_filter", "source_identity", "receiver_identity")


def _station_grid(solution: dict, kind: str, rows: np.ndarray, *, lead_s: float, dt_s: float, n_fft: int,
                  band_index: np.ndarray, taper_bins: int) -> np.ndarray:
    """Responses of the given stations on the correction grid: the filter's
    spectrum in the band, identity outside (and for identity stations)."""
    h = filter_spectra(solution[f"{kind}_filter"][rows], lead_s=lead_s, dt_s=dt_s, n_fft=n_fft)
    grid = band_to_full_grid(h[:, band_index], band_index=band_index, n_rfft=n_fft // 2 + 1, taper=taper_bins)
    grid[solution[f"{kind}_identity"][rows]] = 1.0
    return grid


GRID_BLOCK = 4096  # stations per block when building the grids (bounds the complex128 temporaries)


def station_grids(sol: dict, settings: dict) -> dict[str, np.ndarray]:
    """Every station's response on the correction grid, complex64 [n, n_fft // 2 + 1]
    per kind, and the identity flags: built once per solution and shared by
    every chunk task (building them per chunk cost about 27 of 111 ms)."""
    common = dict(lead_s=settings["lead_s"], dt_s=settings["dt_s"], n_fft=settings["n_fft"],
                  band_index=np.asarray(settings["band_index"], np.int64), taper_bins=settings["taper_bins"])
    out = {}
    for kind in ("source", "receiver"):
        n = len(sol[f"{kind}_filter"])
        grid = np.empty((n, settings["n_fft"] // 2 + 1), np.complex64)
        for a in range(0, n, GRID_BLOCK):
            rows = np.arange(a, min(a + GRID_BLOCK, n))
            grid[rows] = _station_grid(sol, kind, rows, **common)
        out[kind] = grid
        out[f"{kind}_identity"] = np.asarray(sol[f"{kind}_identity"], bool)
    return out


def correct_traces(grids: dict, settings: dict, traces: np.ndarray, si: np.ndarray, ri: np.ndarray,
                   passthrough: np.ndarray) -> np.ndarray:
    """The corrected samples of ``traces`` (rows of one chunk) from the
    stations' responses (:func:`station_grids`); ``passthrough`` rows come
    back untouched. Single precision: the samples are float32."""
    n_fft = settings["n_fft"]
    band_index = np.asarray(settings["band_index"], np.int64)
    weight = grid_band_weight(band_index=band_index, n_rfft=n_fft // 2 + 1, taper=settings["taper_bins"])
    spectrum = settings.get("prewhitening_spectrum")  # per frequency on this grid, or None: one fraction
    prewhitening = settings["prewhitening"] if spectrum is None else np.asarray(spectrum, np.float64)
    corners = settings.get("shaping_hz")
    shaping = band_taper(np.fft.rfftfreq(n_fft, settings["dt_s"]), corners_hz=tuple(corners)) if corners else None
    correction = trace_correction(grids["source"], grids["receiver"], np.maximum(si, 0), np.maximum(ri, 0),
                                  mode=settings["mode"], prewhitening=prewhitening, band_weight=weight,
                                  shaping=shaping)
    return apply_correction(traces, correction, n_fft=n_fft, passthrough=passthrough)


def _rows_to_redo(applied: np.ndarray, si: np.ndarray, ri: np.ndarray, index: int, changed: dict) -> np.ndarray:
    """Rows corrected by an earlier solution whose source or receiver filter
    has since changed beyond the tolerance (``changed``: solution index ->
    (source mask, receiver mask)); rows of unknown solutions are redone."""
    redo = np.zeros(len(applied), bool)
    for u in np.unique(applied):
        if u == index:
            continue
        rows = applied == u
        if int(u) not in changed:
            redo |= rows
            continue
        src, rcv = changed[int(u)]
        s, r = np.maximum(si[rows], 0), np.maximum(ri[rows], 0)
        redo[rows] = src[s] | rcv[r]
    return redo


def apply_chunk(store_path: str, swath: str, chunk: int, start: int, stop: int, solution_id: str, index: int,
                settings: dict, fingerprint: str, changed: dict, grids: dict) -> dict:
    """One chunk: corrected traces written, then the flag. Idempotent.

    A chunk first corrected by an earlier solution (same settings) is
    re-corrected only in its rows whose stations' filters changed
    (``changed``, from :func:`changed_stations`); the other rows keep their
    samples and the record of the solution that corrected them.
    """
    ckpt = Checkpoints(store_path, STAGE, swath, fingerprint)
    done = ckpt.summary(chunk)
    if done is not None and done.get("solution") == solution_id:
        return {"swath": swath, "chunk": chunk, "traces": stop - start, "resumed": True, "seconds": 0.0,
                "passed": 0, "recomputed": 0}
    t0 = time.perf_counter()
    store = SurveyStore.open(store_path)
    # only what this chunk needs: its own rows; the station responses come built (station_grids)
    si = store.array(swath, "geometry/source_index")[start:stop]
    ri = store.array(swath, "geometry/receiver_index")[start:stop]
    flags = store.array(swath, "qc_flags")[start:stop]
    if done is None:
        corrected = np.zeros((stop - start, store.n_samples), np.float32)
        applied = np.full(stop - start, -1, np.int32)
        redo = np.ones(stop - start, bool)
    else:
        corrected, applied = read_corrected_chunk(store_path, swath, start, stop)
        redo = _rows_to_redo(applied, si, ri, index, changed)
    if redo.any():
        traces = store.array(swath, "traces")[start:stop][redo]
        s, r = si[redo], ri[redo]
        passthrough = ~usable_traces(flags[redo], s, r, exclude_bits=settings["exclude_bits"])
        passthrough |= grids["source_identity"][np.maximum(s, 0)] & grids["receiver_identity"][np.maximum(r, 0)]
        corrected[redo] = correct_traces(grids, settings, traces, s, r, passthrough)
        applied[redo] = index
        write_corrected_chunk(store_path, swath, start, corrected, applied)
        passed = int(passthrough.sum())
    else:
        passed = 0
    summary = {"solution": solution_id, "seconds": time.perf_counter() - t0, "passed": passed,
               "recomputed": int(redo.sum())}
    ckpt.mark_done(chunk, summary)
    return {"swath": swath, "chunk": chunk, "traces": stop - start, "resumed": False, **summary}


def changed_stations(store: SurveyStore, old_sid: str, new: dict, *, tolerance: float,
                     measured: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """Which source and receiver stations' filters differ between solution
    ``old_sid`` and the ``new`` one by more than ``tolerance`` (relative RMS;
    identity status changing counts as changed). With a ``measured``
    prewhitening, a noise-to-signal spectrum that moved by more than the
    tolerance changes every station."""
    _, old, _ = read_solution(store, old_sid, names=SOLUTION_ARRAYS)
    masks = []
    for kind in ("source", "receiver"):
        change = filter_change(old[f"{kind}_filter"], new[f"{kind}_filter"])
        flip = np.ones(len(change), bool)
        n_old = len(old[f"{kind}_identity"])
        flip[:n_old] = old[f"{kind}_identity"] != new[f"{kind}_identity"][:n_old]
        masks.append((change > tolerance) | flip)
    if measured and _noise_moved(store, old_sid, new, tolerance):
        masks = [np.ones_like(m) for m in masks]
    return masks[0], masks[1]


def _noise_moved(store: SurveyStore, old_sid: str, new: dict, tolerance: float) -> bool:
    """Whether the measured noise-to-signal spectrum (which sets a measured
    prewhitening) differs between two solutions by more than ``tolerance``."""
    try:
        _, old, _ = read_solution(store, old_sid, names=("noise_to_signal",))
    except KeyError:
        return True  # estimated before the noise was measured: corrected another way
    a, b = old["noise_to_signal"], new.get("noise_to_signal")
    if b is None or a.shape != b.shape:
        return True
    return float(np.linalg.norm(b - a) / max(np.linalg.norm(a), 1e-30)) > tolerance


def correction_settings(store: SurveyStore, solution_id: str, attrs: dict, sol: dict, config: SurveyConfig) -> dict:
    """Plain numbers the chunk tasks need, also recorded with the output.

    ``prewhitening_mode`` is the mode in effect: ``measured`` puts the
    per-frequency prewhitening on the correction grid in
    ``prewhitening_spectrum`` (a list; ``prewhitening`` then holds its median
    over the band, for display); ``fixed`` leaves it None and corrects with
    the one fraction ``prewhitening``. A solution estimated before the noise
    level was measured (no finite ``noise_to_signal``) falls back to the fixed
    fraction, with a message in ``warnings`` and in the log.
    """
    dt = attrs["dt_s"]
    n_taps = sol["source_filter"].shape[1]
    n_fft = correction_n_fft(store.n_samples, filter_samples=2 * n_taps)
    f = np.fft.rfftfreq(n_fft, dt)
    lo, hi = attrs["config"]["analysis"]["band_hz"]
    band_index = np.flatnonzero((f >= lo) & (f <= hi))
    c = config.correction
    pw_mode, prewhitening, spectrum, warnings = "fixed", c.prewhitening, None, []
    if c.mode == "full" and c.prewhitening_mode == "measured":
        nu = sol.get("noise_to_signal")
        if nu is not None and len(nu) and np.all(np.isfinite(nu)) and len(band_index):
            p = prewhitening_spectrum(nu, band_hz=sol["freq_hz"], grid_hz=f, scale=c.prewhitening_scale)
            pw_mode, prewhitening, spectrum = "measured", float(np.median(p[band_index])), p.tolist()
        else:
            # no solution id in the message: it is part of the settings, which must not change per solution
            warnings.append(
                "the solution carries no measured noise-to-signal ratio (estimated by an older version, or no pair "
                f"energy at some band frequency): correcting with the fixed prewhitening {c.prewhitening:g} of the "
                "mean in-band power instead of correction.prewhitening_mode = 'measured'; run 'descatter estimate' "
                "again for the measured one")
            log.warning("solution %s: %s", solution_id, warnings[-1])
    return {
        "solution": solution_id, "mode": c.mode, "prewhitening": prewhitening,
        "prewhitening_mode": pw_mode, "prewhitening_scale": None if spectrum is None else c.prewhitening_scale,
        "prewhitening_spectrum": spectrum,
        "band_hz": [lo, hi], "band_taper_hz": c.band_taper_hz, "shaping_hz": list(c.shaping_hz),
        "taper_bins": int(round(c.band_taper_hz / (f[1] - f[0]))), "n_fft": int(n_fft),
        "band_index": band_index.tolist(), "lead_s": attrs["config"]["estimate"]["filter_lead_s"],
        "exclude_bits": int(config.qc.exclude_bits()), "dt_s": dt, "warnings": warnings,
    }


def apply_solution(store_path: str | Path, config: SurveyConfig, *, client, solution: str | None = None,
                   progress=None) -> dict:
    """Correct every committed swath with a solution (default: the current one).

    Swaths corrected before with the same settings are re-corrected only
    where station filters changed by more than ``correction.reapply_tolerance``
    since the solution that corrected each trace; new swaths and changed
    settings are corrected in full.
    """
    from distributed import as_completed

    t0 = time.perf_counter()
    with store_writer(store_path, "apply") as (store, runlog):
        sid, sol, attrs = read_solution(store, solution)
        settings = correction_settings(store, sid, attrs, sol, config)
        tolerance = config.correction.reapply_tolerance
        records = store.manifest()
        futures = []
        present, masks = set(list_solutions(store)), {}
        # what comes from the solution is not part of the fingerprint (its filters, and a measured
        # prewhitening): a new solution re-corrects only what it changes
        per_solution = {"solution", "prewhitening_spectrum", "warnings"}
        if settings["prewhitening_mode"] == "measured":
            per_solution.add("prewhitening")
        fixed = {k: v for k, v in settings.items() if k not in per_solution}
        for w in settings["warnings"]:
            runlog.write(STAGE, "warning", message=w)
        grids_f = None  # built and scattered once, when a chunk needs them
        # scattered once: passed by value, its lists (band, prewhitening spectrum) were walked by
        # Dask for every chunk's task
        settings_f = client.scatter(settings, hash=False, broadcast=True)
        token = uuid.uuid4().hex[:8]  # task keys of this call only (see submit_spectra)
        for rec in records:
            fp = hashlib.blake2b(json.dumps({"v": STAGE_VERSION, "swath": rec.fingerprint, **fixed},
                                            sort_keys=True).encode(), digest_size=16).hexdigest()
            if (corrected_settings(store, rec.name) or {}).get("fingerprint") != fp:
                create_corrected(store, rec.name, settings={k: v for k, v in fixed.items() if k != "band_index"}
                                 | {"fingerprint": fp})
                Checkpoints(store.path, STAGE, rec.name, fp).clear()
            index, used = corrected_solution_index(store, rec.name, sid)
            mark_corrected_solution(store, rec.name, None)
            # per earlier solution still in the store: its station masks, computed and scattered
            # once per apply (rows of solutions no longer in the store are redone)
            changed_f = {}
            for u, old_sid in enumerate(used):
                if old_sid == sid or old_sid not in present:
                    continue
                if old_sid not in masks:
                    masks[old_sid] = client.scatter(changed_stations(
                        store, old_sid, sol, tolerance=tolerance, measured=settings["prewhitening_mode"] == "measured"),
                        hash=False)
                changed_f[u] = masks[old_sid]
            if grids_f is None:
                grids_f = client.scatter(station_grids(sol, settings), hash=False, broadcast=True)
            futures += map_chunks(client, apply_chunk, str(store.path), rec.name, rec.chunk_bounds(),
                                  key=f"apply-{rec.name}-{token}", solution_id=sid, index=index,
                                  settings=settings_f, fingerprint=fp, changed=changed_f, grids=grids_f)
        runlog.write(STAGE, "start", solution=sid, chunks=len(futures), mode=settings["mode"],
                     prewhitening=settings["prewhitening"], reapply_tolerance=tolerance)
        total = sum(r.n_traces for r in records)
        done = resumed = passed = recomputed = 0
        for fut in as_completed(futures):
            s = fut.result()
            done += s["traces"]
            resumed += s["resumed"]
            passed += s["passed"]
            recomputed += s["recomputed"]
            runlog.write(STAGE, "batch", swath=s["swath"], chunk=s["chunk"], traces=s["traces"], seconds=round(s["seconds"], 4),
                         resumed=s["resumed"], recomputed=s["recomputed"])
            if progress:
                progress("apply", done, total)
            if not s["resumed"]:
                fault_point(STAGE)
        for rec in records:
            mark_corrected_solution(store, rec.name, sid)
        seconds = time.perf_counter() - t0
        runlog.write(STAGE, "end", solution=sid, traces=total, recomputed=recomputed, passed_through=passed,
                     seconds=round(seconds, 3))
        return {"solution": sid, "traces": total, "recomputed": recomputed, "passed_through": passed,
                "resumed_chunks": resumed, "seconds": seconds, "settings": settings,
                "warnings": settings["warnings"]}
