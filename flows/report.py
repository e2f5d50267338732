"""``descatter report``: a QC page of one solution and its corrected traces.

Reads the solution, the station tables, the raw and the corrected traces
through storage; computes the numbers with the kernels of
:mod:`descatter.tasks.quality` and :mod:`descatter.tasks.report_metrics`;
builds the figures (:mod:`descatter.flows.report_figures`) and the page
(:mod:`descatter.flows.report_page`); hands them to
:mod:`descatter.storage.report_files`. Trace metrics read whole shots, in
batches, at most ``max_traces`` traces spread evenly over the survey.

On a synthetic survey (``descatter synth``) the truth file beside the swaths'
SEG-Y files gives each corrected trace's clean truth (the same trace without
station filters and noise): the report then states how closely the corrected
traces match it (``truth_correlation`` of :func:`descatter.tasks.report_metrics.batch_quality`).
That file is found beside the files the manifest records
(:func:`descatter.storage.arrays_file.truth_beside`).
"""

from __future__ import annotations

import logging
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from descatter.flows import report_figures as figs
from descatter.tasks.trace_qc import usable_traces
from descatter.flows.report_page import CAUTION, build_page
from descatter.storage.arrays_file import read_arrays, truth_beside
from descatter.storage.checkpoints import Checkpoints
from descatter.storage.config_file import parse_config
from descatter.storage.estimation import corrected_settings, read_solution
from descatter.storage.report_files import ReportFolder
from descatter.storage.stations import read_qc_flags, read_stations, read_swath_geometry
from descatter.storage.store import SurveyStore
from descatter.tasks.config import SurveyConfig
from descatter.tasks.errors import InputNotFoundError, StoreFormatError
from descatter.tasks.geometry import station_layout
from descatter.tasks.moveout import window_samples, window_taper
from descatter.tasks.quality import spacing_adequacy
from descatter.tasks.report_metrics import (
    analysis_traces, batch_quality, cmp_bin_centres, cmp_bin_keys, distribution_summary, even_shot_sample,
    extreme_station_pairs, group_signal_to_noise, match_stations, mean_row_peak, merge_semblance_sums,
    nyquist_spacing_curve, pair_crosscorrelation, row_repeatability, semblance_from_sums, snr_gain_db,
    CLEAN_TRUTH_KEYS, truth_clean_traces, upper_quantile_mask,
)

log = logging.getLogger(__name__)

__all__ = ["write_report", "CAUTION"]

ATTRIBUTES = (  # solution array suffix, title, unit
    ("scattering_fraction", "scattering fraction", "fraction of band energy"),
    ("static_ms", "static", "ms"),
    ("amplitude_db", "amplitude", "dB"),
    ("coherence", "coherence", "0-1"),
    ("pairs", "pair count", "pairs"),
)
KINDS = (("source", "sources"), ("receiver", "receivers"))
MAX_LAG_S = 0.2          # lag range of the pair panels
MAX_PAIR_SHOTS = 60      # rows of one pair panel
BATCH_TRACES = 20_000    # traces held at once (whole shots)
MIN_CMP_FOLD = 4         # bins with fewer traces give no S/N (semblance of 1 trace is 1)
HIGH_ZONE_QUANTILE = 0.75
# synthetic coordinates are written at centimetre precision (flows.synth COORDINATE_SCALAR)
TRUTH_MATCH_M = 0.05
CORRELATION_EDGES = np.linspace(-1.0, 1.0, 41)  # histogram bins of the truth correlations
COMMON_VELOCITIES_MPS = (100.0, 300.0)  # common practice, DESIGN section 5


@dataclass(frozen=True)
class Analysis:
    """The analysis the estimation used, as plain numbers for the kernels."""

    dt_s: float
    n_samples: int
    start: int                 # window samples start:stop on the t0 axis
    stop: int
    window_s: tuple[float, float]
    band_hz: tuple[float, float]
    band_taper_hz: float
    moveout: dict
    taper: np.ndarray          # window weights [n_samples]

    @classmethod
    def of(cls, config: SurveyConfig, *, dt_s: float, n_samples: int) -> "Analysis":
        a = config.analysis
        first, count = window_samples(dt_s=dt_s, start_s=a.window_start_s, end_s=a.window_end_s)
        start, stop = min(first, n_samples - 1), min(first + count, n_samples)
        v = np.asarray(a.velocity, float)
        moveout = {"moveout": a.moveout, "velocity_t0_s": v[:, 0], "velocity_vrms_mps": v[:, 1],
                   "stretch_mute": a.stretch_mute, "lmo_velocity_mps": a.lmo_velocity_mps}
        taper = window_taper(n_samples, dt_s=dt_s, start_s=a.window_start_s, end_s=a.window_end_s,
                             taper_s=a.taper_s)
        return cls(dt_s, n_samples, start, max(stop, start + 1), (a.window_start_s, a.window_end_s),
                   tuple(a.band_hz), config.correction.band_taper_hz, moveout, taper)

    def flat(self, traces, offset_m, delay_s, *, band: bool = True, window: bool = False) -> np.ndarray:
        """Moveout-corrected traces; with ``band`` band limited, with
        ``window`` tapered to the analysis window."""
        return analysis_traces(traces, offset_m=offset_m, delay_s=delay_s, dt_s=self.dt_s,
                               band_hz=self.band_hz if band else None, band_taper_hz=self.band_taper_hz,
                               window_weights=self.taper if window else None, **self.moveout)


# -- reading ---------------------------------------------------------------

def _read_rows(store: SurveyStore, swath: str, key: str, rows: np.ndarray) -> np.ndarray:
    """Rows (sorted) of a swath array; one slice when they are contiguous."""
    arr = store.array(swath, key)
    if rows.size and rows[-1] - rows[0] + 1 == rows.size:
        return arr[int(rows[0]):int(rows[-1]) + 1]
    return arr.oindex[rows]


def _check_corrected(store: SurveyStore, sid: str) -> dict[str, dict]:
    """Corrected-array settings per swath; InputNotFoundError when a swath
    has none or its correction did not finish."""
    missing, partial, out = [], [], {}
    for rec in store.manifest():
        settings = corrected_settings(store, rec.name)
        if settings is None:
            missing.append(rec.name)
            continue
        done = Checkpoints(store.path, "apply", rec.name, settings.get("fingerprint", "")).done_chunks()
        if len(done) < len(rec.chunk_bounds()):
            partial.append(f"{rec.name} ({len(done)} of {len(rec.chunk_bounds())} chunks)")
        out[rec.name] = settings
    if missing or partial:
        what = []
        if missing:
            what.append("no corrected traces in swath(s) " + ", ".join(missing))
        if partial:
            what.append("unfinished corrected traces in swath(s) " + ", ".join(partial))
        raise InputNotFoundError(f"{store.path}: {'; '.join(what)}; the report compares the input with the "
                                 f"corrected traces of solution {sid} (run 'descatter apply {store.path}')")
    return out


@dataclass
class ShotTable:
    """Every shot of the survey (live traces only), in manifest order."""

    swath: np.ndarray          # int: position of the swath in the manifest
    shot: np.ndarray           # int64 shot id (unique within its swath)
    source: np.ndarray         # int64 source station row
    count: np.ndarray          # int64 live traces
    pair_rows: dict            # receiver row -> list of (swath position, trace row, shot)


def _shot_table(store: SurveyStore, config: SurveyConfig, receivers_wanted: set[int]) -> ShotTable:
    cols = {k: [] for k in ("swath", "shot", "source", "count")}
    pair_rows: dict[int, list] = {r: [] for r in receivers_wanted}
    wanted = np.array(sorted(receivers_wanted), np.int64)
    for pos, name in enumerate(store.swath_names()):
        g = read_swath_geometry(store, name, ["shot", "source_index", "receiver_index"])
        live = usable_traces(read_qc_flags(store, name), g["source_index"], g["receiver_index"],
                             exclude_bits=config.qc.exclude_bits())
        shots, first, count = np.unique(g["shot"][live], return_index=True, return_counts=True)
        cols["swath"].append(np.full(len(shots), pos))
        cols["shot"].append(shots)
        cols["source"].append(g["source_index"][live][first])
        cols["count"].append(count)
        for row in np.flatnonzero(live & np.isin(g["receiver_index"], wanted)):
            pair_rows[int(g["receiver_index"][row])].append((pos, int(row), int(g["shot"][row])))
    arrays = {k: np.concatenate(v).astype(np.int64) if v else np.zeros(0, np.int64) for k, v in cols.items()}
    return ShotTable(**arrays, pair_rows=pair_rows)


# -- trace metrics -----------------------------------------------------------

def _cmp_binning(config: SurveyConfig, tables: dict, spacing: dict) -> dict:
    bx, by = config.geometry.fold_bin_m
    if bx <= 0 or by <= 0:
        s = np.nanmax([spacing["receiver"]["station_spacing_m"], spacing["source"]["station_spacing_m"]])
        bx = by = float(s) if np.isfinite(s) else 25.0
    xs = np.concatenate([tables["source"]["x"], tables["receiver"]["x"]])
    ys = np.concatenate([tables["source"]["y"], tables["receiver"]["y"]])
    return {"bin_m": (float(bx), float(by)), "origin": (float(np.min(xs)), float(np.min(ys)))}


def _trace_metrics(store: SurveyStore, config: SurveyConfig, table: ShotTable, chosen: np.ndarray,
                   an: Analysis, binning: dict, truth: dict | None = None) -> dict:
    """Per-shot semblance, per-CMP-bin sums and mean spectra, batch by batch
    of whole shots; with ``truth`` (:func:`_truth_of`) also each trace's
    correlation with its clean truth, before and after."""
    n = len(table.shot)
    truth_parts = {"entry": [], "before": [], "after": []}
    semblance = {"before": np.full(n, np.nan), "after": np.full(n, np.nan)}
    n_used = np.zeros(n, np.int64)
    cmp_sums = {"before": (), "after": ()}
    spec_sum = {"before": 0.0, "after": 0.0}
    n_spec, freqs = 0, np.zeros(0)
    for pos, name in enumerate(store.swath_names()):
        entries = chosen[table.swath[chosen] == pos]  # sorted by shot id, as the table is within a swath
        if entries.size == 0:
            continue
        g = read_swath_geometry(store, name, ["shot", "source_index", "receiver_index", "offset", "cmp_x", "cmp_y"])
        live = usable_traces(read_qc_flags(store, name), g["source_index"], g["receiver_index"],
                             exclude_bits=config.qc.exclude_bits())
        delay = store.array(name, "headers/delay_ms")[:] * 1e-3
        cum = np.cumsum(table.count[entries])
        for batch in np.split(entries, np.flatnonzero(np.diff((cum - 1) // BATCH_TRACES)) + 1):
            rows = np.flatnonzero(live & np.isin(g["shot"], table.shot[batch]))
            cmp_keys = cmp_bin_keys(g["cmp_x"][rows], g["cmp_y"][rows], **binning)
            clean = None
            if truth is not None:
                clean = an.flat(truth_clean_traces(truth["arrays"], truth["source"][g["source_index"][rows]],
                                                   truth["receiver"][g["receiver_index"][rows]],
                                                   n_samples=an.n_samples), g["offset"][rows], delay[rows])
                truth_parts["entry"].append(batch[np.searchsorted(table.shot[batch], g["shot"][rows])])
            for side, key in (("before", "traces"), ("after", "corrected")):
                flat = an.flat(_read_rows(store, name, key, rows), g["offset"][rows], delay[rows], band=False)
                q = batch_quality(flat, shots=g["shot"][rows], cmp_keys=cmp_keys, dt_s=an.dt_s, band_hz=an.band_hz,
                                  band_taper_hz=an.band_taper_hz, start=an.start, stop=an.stop,
                                  window_weights=an.taper, truth=clean)
                if clean is not None:
                    truth_parts[side].append(q["truth_correlation"])
                if not np.array_equal(q["shot"], table.shot[batch]):
                    raise StoreFormatError(f"{store.path}: the geometry of swath {name!r} changed while the report "
                                           "read it (a geometry rebuild?); run the report again")
                semblance[side][batch] = q["semblance"]
                n_used[batch] = q["count"]
                # merged batch by batch: memory of one stack per bin, not per batch
                cmp_sums[side] = merge_semblance_sums([cmp_sums[side], q["cmp"]] if cmp_sums[side] else [q["cmp"]])
                spec_sum[side] = spec_sum[side] + q["spectrum_sum"]
                freqs = q["freqs_hz"]
            n_spec += rows.size
    cmp = {}
    for side in ("before", "after"):
        labels, stack, energy, count = cmp_sums[side] or merge_semblance_sums([])
        cmp[side] = (labels, semblance_from_sums(stack, energy, count), count)
    truth_traces = None
    if truth is not None:
        truth_traces = {k: np.concatenate(v) if v else np.zeros(0, np.int64 if k == "entry" else np.float64)
                        for k, v in truth_parts.items()}
    return {"semblance_before": semblance["before"], "semblance_after": semblance["after"], "n_traces": n_used,
            "cmp": cmp, "freqs_hz": freqs, "spectrum_before": spec_sum["before"] / max(n_spec, 1),
            "spectrum_after": spec_sum["after"] / max(n_spec, 1), "traces_used": int(n_spec),
            "truth": truth_traces}


# -- pair panels, shot gather, spacing ---------------------------------------

def _pair_panel(store: SurveyStore, table: ShotTable, an: Analysis, j: int, k: int) -> dict | None:
    """Per-shot cross-correlations of receivers j and k, before and after."""
    names = store.swath_names()
    by_shot_j = {(p, s): r for p, r, s in reversed(table.pair_rows[j])}  # first trace of a shot wins
    by_shot_k = {(p, s): r for p, r, s in reversed(table.pair_rows[k])}
    common = sorted(set(by_shot_j) & set(by_shot_k))
    if not common:
        return None
    common = [common[i] for i in even_shot_sample(np.ones(len(common), np.int64), max_traces=MAX_PAIR_SHOTS)]
    max_lag = int(round(MAX_LAG_S / an.dt_s))
    out = {"shots": [], "swaths": [], "before": [], "after": []}
    for pos in sorted({p for p, _ in common}):
        name = names[pos]
        keys = [c for c in common if c[0] == pos]
        rj = np.array([by_shot_j[c] for c in keys], np.int64)
        rk = np.array([by_shot_k[c] for c in keys], np.int64)
        rows = np.unique(np.concatenate([rj, rk]))
        offset = _read_rows(store, name, "geometry/offset", rows)
        delay = _read_rows(store, name, "headers/delay_ms", rows) * 1e-3
        ij, ik = np.searchsorted(rows, rj), np.searchsorted(rows, rk)
        for side, key in (("before", "traces"), ("after", "corrected")):
            w = an.flat(_read_rows(store, name, key, rows), offset, delay, window=True)
            out[side].append(pair_crosscorrelation(w[ij], w[ik], max_lag=max_lag))
        out["shots"] += [int(s) for _, s in keys]
        out["swaths"] += [name] * len(keys)
    panel = {"lags_ms": np.round(np.arange(-max_lag, max_lag + 1) * an.dt_s * 1e3, 9), "shots": out["shots"],
             "swaths": out["swaths"]}
    for side in ("before", "after"):
        corr = np.concatenate(out[side])
        peak, at = mean_row_peak(corr)
        panel |= {side: corr, f"{side}_peak": peak, f"{side}_peak_lag_ms": float(panel["lags_ms"][at]),
                  f"{side}_repeatability": row_repeatability(corr)}
    return panel


def _display_gather(store: SurveyStore, config: SurveyConfig, table: ShotTable, src_fraction: np.ndarray,
                    an: Analysis) -> dict | None:
    """The shot of the most scattering source (its largest shot), NMO and band limited."""
    if len(table.shot) == 0:
        return None
    frac = src_fraction[table.source]
    best = np.lexsort((-table.count, -frac))[0]
    name = store.swath_names()[table.swath[best]]
    g = read_swath_geometry(store, name, ["shot", "source_index", "receiver_index", "offset"])
    live = usable_traces(read_qc_flags(store, name), g["source_index"], g["receiver_index"],
                         exclude_bits=config.qc.exclude_bits())
    rows = np.flatnonzero(live & (g["shot"] == table.shot[best]))
    delay = _read_rows(store, name, "headers/delay_ms", rows) * 1e-3
    out = {"swath": name, "shot": int(table.shot[best]), "source": int(table.source[best]),
           "scattering_fraction": float(frac[best]), "n_traces": int(rows.size)}
    for side, key in (("before", "traces"), ("after", "corrected")):
        out[side] = an.flat(_read_rows(store, name, key, rows), g["offset"][rows], delay)
    return out


def _spacing(config: SurveyConfig, tables: dict) -> dict:
    a = config.analysis
    out = {}
    for kind, _ in KINDS:
        layout = station_layout(tables[kind]["x"], tables[kind]["y"])
        spacing = layout["station_spacing_m"]
        check = (spacing_adequacy(spacing, velocity_mps=a.near_surface_velocity_mps, band_hz=tuple(a.band_hz))
                 if np.isfinite(spacing) and spacing > 0 else
                 {"station_spacing_m": spacing, "aliased": False,
                  "warning": f"fewer than two {kind} stations: spacing undefined"})
        out[kind] = {**layout, **check}
    lo, hi = a.band_hz
    freqs = np.linspace(max(lo, 1.0), hi, 64)
    velocities = np.array(sorted({*COMMON_VELOCITIES_MPS, a.near_surface_velocity_mps}))
    out["curve"] = {"freqs_hz": freqs, "velocities_mps": velocities,
                    "nyquist_spacing_m": nyquist_spacing_curve(freqs, velocities)}
    return out


# -- comparison with a synthetic truth ---------------------------------------

def _truth_of(store: SurveyStore, tables: dict) -> tuple[dict | None, dict]:
    """The synthetic truth of the survey, if its swaths' SEG-Y files have one
    beside them: ``({"arrays", "file", "source", "receiver"}, status)`` with
    the truth's station row of every station of the store, or ``(None,
    status)`` with the reason in ``status``."""
    candidates, existing = truth_beside([rec.file for rec in store.manifest()])
    files, found = [str(p) for p in candidates], [str(p) for p in existing]
    if not found:
        name = candidates[0].name if candidates else "truth file"
        return None, {"available": False, "reason": f"no {name} beside the swaths' SEG-Y files "
                                                    "(only synthetic surveys have a truth)"}
    if len(found) > 1 or len(files) > 1:
        return None, {"available": False, "reason": "the swaths' SEG-Y files lie in several folders "
                                                    f"({', '.join(files)}): no single truth for the survey"}
    arrays = read_arrays(found[0])
    status = {"available": False, "file": found[0]}
    missing = [k for k in CLEAN_TRUTH_KEYS if k not in arrays]
    if missing:
        return None, status | {"reason": f"the truth file lacks the arrays {', '.join(missing)}"}
    if abs(float(arrays["dt_s"]) - store.sample_interval_s) > 1e-9:
        return None, status | {"reason": f"the truth's sample interval {float(arrays['dt_s'])} s is not the "
                                         f"store's {store.sample_interval_s} s"}
    rows = {}
    for kind, _ in KINDS:
        t = tables[kind]
        rows[kind] = match_stations(t["x"], t["y"], reference_x=arrays[f"{kind}_x"],
                                    reference_y=arrays[f"{kind}_y"], tolerance_m=TRUTH_MATCH_M)
        if np.any(rows[kind] < 0):
            return None, status | {"reason": f"{int(np.sum(rows[kind] < 0))} of {len(rows[kind])} {kind} "
                                             f"stations have no truth station within {TRUTH_MATCH_M} m: "
                                             "the truth belongs to another survey"}
    return {"arrays": arrays, "file": found[0], **rows}, status | {"available": True}


TRUTH_DEFINITION = (
    "zero-lag correlation c = sum_t a(t) b(t) / sqrt(sum_t a(t)^2 sum_t b(t)^2) of each trace a with its clean "
    "truth b (the same trace synthesised without station filters and without noise), both NMO corrected and "
    "band limited like the semblance traces, over the analysis window; no time shift or scale is fitted"
)


def _truth_summary(status: dict, tm: dict, shots: dict, chosen: np.ndarray) -> dict:
    """metrics.json's ``truth_comparison``: distributions of the per-trace
    correlations over the traces used, the high-scattering zone and the rest."""
    if not status.get("available") or tm["truth"] is None:
        return status
    t = tm["truth"]
    zone = np.asarray(shots["high_scattering"], bool)[np.searchsorted(chosen, t["entry"])]
    out = status | {"definition": TRUTH_DEFINITION, "traces": int(len(t["entry"]))}
    for where, mask in (("survey", np.ones(len(zone), bool)), ("high_scattering_zone", zone),
                        ("outside_zone", ~zone)):
        out[where] = {side: distribution_summary(t[side][mask], edges=CORRELATION_EDGES)
                      for side in ("before", "after")}
    return out


# -- the report ----------------------------------------------------------------

def _station_tables(store: SurveyStore, sol: dict) -> dict:
    out = {}
    for kind, table_name in KINDS:
        t = read_stations(store, table_name)
        n = len(sol[f"{kind}_pairs"])
        out[kind] = {k: v[:n] for k, v in t.items()}
    return out


def _station_metrics(tables: dict, sol: dict) -> dict:
    out = {}
    for kind, _ in KINDS:
        t = tables[kind]
        out[kind] = {"station": t["key"], "x": t["x"], "y": t["y"], "identity": sol[f"{kind}_identity"],
                     **{name: sol[f"{kind}_{name}"] for name, _, _ in ATTRIBUTES}}
    return out


def _mean(values: np.ndarray) -> float:
    v = values[np.isfinite(values)]
    return float(v.mean()) if v.size else float("nan")


def _summary(shots: dict) -> dict:
    zone = shots["high_scattering"]
    out = {}
    for where, mask in (("survey", np.ones(len(zone), bool)), ("high_scattering_zone", zone)):
        b, a = _mean(shots["semblance_before"][mask]), _mean(shots["semblance_after"][mask])
        out[where] = {"shots": int(mask.sum()), "mean_semblance_before": b, "mean_semblance_after": a,
                      "semblance_ratio": a / b if b > 0 else float("nan"),
                      "median_snr_before": float(np.median(shots["snr_before"][mask])) if mask.any() else np.nan,
                      "median_snr_after": float(np.median(shots["snr_after"][mask])) if mask.any() else np.nan}
    return out


def _shot_metrics(store: SurveyStore, table: ShotTable, chosen: np.ndarray, tm: dict, tables: dict,
                  sol: dict) -> tuple[dict, float]:
    """Per-shot columns of the chosen shots, and the source scattering
    fraction from which a shot is in the high-scattering zone."""
    frac = sol["source_scattering_fraction"]
    fired = np.zeros(len(frac), bool)
    fired[table.source] = True
    threshold, zone = upper_quantile_mask(frac, eligible=fired & ~sol["source_identity"],
                                          quantile=HIGH_ZONE_QUANTILE)
    src = table.source[chosen]
    shots = {
        "swath": [store.swath_names()[p] for p in table.swath[chosen]], "shot": table.shot[chosen],
        "source_station": tables["source"]["key"][src], "x": tables["source"]["x"][src],
        "y": tables["source"]["y"][src], "n_traces": tm["n_traces"][chosen],
        "source_scattering_fraction": frac[src], "high_scattering": zone[src],
        "semblance_before": tm["semblance_before"][chosen], "semblance_after": tm["semblance_after"][chosen],
    }
    shots["snr_before"] = group_signal_to_noise(shots["semblance_before"], shots["n_traces"])
    shots["snr_after"] = group_signal_to_noise(shots["semblance_after"], shots["n_traces"])
    shots["snr_gain_db"] = snr_gain_db(shots["snr_before"], shots["snr_after"])
    return shots, threshold


def _pair_panels(store: SurveyStore, table: ShotTable, an: Analysis, pairs: list, tables: dict,
                 sol: dict) -> list[dict]:
    frac, rcv = sol["receiver_scattering_fraction"], tables["receiver"]
    panels = []
    for j, k, group in pairs:
        p = _pair_panel(store, table, an, j, k)
        if p is None:  # the two receivers share no shot
            continue
        panels.append({"group": group, "receivers": [int(rcv["key"][j]), int(rcv["key"][k])],
                       "receiver_rows": [j, k], "scattering_fraction": [float(frac[j]), float(frac[k])],
                       "x": rcv["x"][[j, k]], "y": rcv["y"][[j, k]], **p})
    return panels


def write_report(store_path: str | Path, outdir: str | Path, *, solution: str | None = None,
                 max_traces: int = 200_000) -> dict:
    """Write the QC report of a solution (default: the current one) to
    ``outdir``: index.html, PNG figures and metrics.json. Needs the
    corrected traces (``descatter apply``). Returns paths and headline numbers."""
    store = SurveyStore.open(store_path)
    sid, sol, attrs = read_solution(store, solution)
    config = parse_config(attrs["config"], source=f"{store.path} solution {sid}")
    corrected = _check_corrected(store, sid)
    an = Analysis.of(config, dt_s=store.sample_interval_s, n_samples=store.n_samples)
    tables = _station_tables(store, sol)
    rcv_ok = ~sol["receiver_identity"] & (sol["receiver_pairs"] > 0)
    pairs = extreme_station_pairs(sol["receiver_scattering_fraction"], tables["receiver"]["x"],
                                  tables["receiver"]["y"], eligible=rcv_ok)
    table = _shot_table(store, config, {r for j, k, _ in pairs for r in (j, k)})
    chosen = even_shot_sample(table.count, max_traces=max_traces)
    spacing = _spacing(config, tables)
    binning = _cmp_binning(config, tables, spacing)
    truth, truth_status = _truth_of(store, tables)
    log.info("report of solution %s: %d of %d shots%s", sid, len(chosen), len(table.shot),
             "; comparison with the synthetic truth" if truth else "")
    tm = _trace_metrics(store, config, table, chosen, an, binning, truth)

    shots, threshold = _shot_metrics(store, table, chosen, tm, tables, sol)
    cmp = _cmp_metrics(tm["cmp"], binning)
    panels = _pair_panels(store, table, an, pairs, tables, sol)
    gather = _display_gather(store, config, table, sol["source_scattering_fraction"], an)
    summary = _summary(shots)
    truth_comparison = _truth_summary(truth_status, tm, shots, chosen)
    sampled = len(chosen) < len(table.shot)
    solutions_used = sorted({s.get("solution") for s in corrected.values()})
    doc = {
        "solution": sid, "created": attrs.get("created"), "store": str(store.path), "caution": CAUTION,
        "corrected_with": solutions_used, "correction": {k: v for k, v in next(iter(corrected.values())).items()
                                                         if k in ("mode", "prewhitening", "band_hz", "solution")},
        "analysis": {"window_s": an.window_s, "window_samples": [an.start, an.stop], "band_hz": an.band_hz,
                     "band_taper_hz": an.band_taper_hz, "moveout": config.analysis.moveout,
                     "velocity": config.analysis.velocity, "stretch_mute": config.analysis.stretch_mute,
                     "dt_s": an.dt_s},
        "sampling": {"max_traces": max_traces, "sampled": sampled, "shots_total": len(table.shot),
                     "shots_used": len(chosen), "traces_total": int(table.count.sum()),
                     "traces_used": tm["traces_used"]},
        "high_scattering_zone": {"quantile": HIGH_ZONE_QUANTILE, "source_fraction_threshold": threshold},
        "summary": summary,
        "units": {"static_ms": "ms", "amplitude_db": "dB", "scattering_fraction": "fraction",
                  "coherence": "0-1", "pairs": "count", "x": "m", "y": "m", "snr": "power ratio",
                  "snr_gain_db": "dB", "lags_ms": "ms", "freqs_hz": "Hz"},
        "stations": _station_metrics(tables, sol),
        "shots": shots, "cmp_bins": cmp,
        "pair_panels": panels,
        "shot_gather": None if gather is None else {k: v for k, v in gather.items() if k not in ("before", "after")},
        "spectra": {"freqs_hz": tm["freqs_hz"], "mean_amplitude_before": tm["spectrum_before"],
                    "mean_amplitude_after": tm["spectrum_after"]},
        "spacing": spacing,
        "truth_comparison": truth_comparison,
    }
    folder = ReportFolder(outdir)
    figures = _figures(doc, tables, sol, gather, an)
    paths = {name: folder.write_figure(name, fig) for name, fig in figures.items()}
    metrics = folder.write_metrics(doc)
    page = folder.write_page(build_page(doc, {n: p.name for n, p in paths.items()}))
    return {"index": page, "metrics": metrics, "figures": paths, "solution": sid,
            "sampled": sampled, "traces_used": tm["traces_used"],
            "mean_semblance_before": summary["survey"]["mean_semblance_before"],
            "mean_semblance_after": summary["survey"]["mean_semblance_after"],
            "high_zone_semblance_before": summary["high_scattering_zone"]["mean_semblance_before"],
            "high_zone_semblance_after": summary["high_scattering_zone"]["mean_semblance_after"],
            "spacing_aliased": {k: bool(spacing[k]["aliased"]) for k, _ in KINDS},
            "truth_median_correlation_before": _truth_median(truth_comparison, "before"),
            "truth_median_correlation_after": _truth_median(truth_comparison, "after")}


def _truth_median(truth_comparison: dict, side: str) -> float | None:
    """Median correlation with the truth over the traces used, or None
    without a truth."""
    if not truth_comparison.get("available"):
        return None
    return truth_comparison["survey"][side]["median"]


def _cmp_metrics(cmp: dict, binning: dict) -> dict:
    labels, s_b, count = cmp["before"]
    _, s_a, _ = cmp["after"]  # the same bins: both sides read the same traces
    keep = count >= MIN_CMP_FOLD
    ix, iy, x, y = cmp_bin_centres(labels[keep], **binning)
    out = {"bin_m": binning["bin_m"], "origin": binning["origin"], "min_fold": MIN_CMP_FOLD,
           "bins_below_min_fold": int((~keep).sum()), "ix": ix, "iy": iy, "x": x, "y": y,
           "fold": count[keep], "semblance_before": s_b[keep], "semblance_after": s_a[keep]}
    out["snr_before"] = group_signal_to_noise(out["semblance_before"], out["fold"])
    out["snr_after"] = group_signal_to_noise(out["semblance_after"], out["fold"])
    return out


def _figures(doc: dict, tables: dict, sol: dict, gather: dict | None, an: Analysis) -> dict:
    out = {}
    st = doc["stations"]
    for kind, table_name in KINDS:
        values = {name: (title, unit, st[kind][name]) for name, title, unit in ATTRIBUTES}
        out[f"stations_{table_name}"] = figs.station_map_figure(kind, st[kind]["x"], st[kind]["y"], values,
                                                                identity=st[kind]["identity"])
    if doc["pair_panels"]:
        out["pair_correlations"] = figs.pair_panels_figure(doc["pair_panels"])
    if gather is not None:
        out["shot_gather"] = figs.gather_figure(gather, dt_s=an.dt_s, window_s=an.window_s)
    sp = doc["spectra"]
    out["spectra"] = figs.spectra_figure(sp["freqs_hz"], sp["mean_amplitude_before"], sp["mean_amplitude_after"],
                                         band_hz=an.band_hz)
    out["snr"] = figs.snr_figure(doc["shots"], doc["cmp_bins"])
    out["snr_map"] = figs.snr_map_figure(doc["shots"], tables["receiver"]["x"], tables["receiver"]["y"])
    out["spacing"] = figs.spacing_figure(doc["spacing"])
    if doc["truth_comparison"].get("available"):
        out["truth_correlation"] = figs.truth_correlation_figure(doc["truth_comparison"])
    return out
