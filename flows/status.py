"""``descatter status``: progress of the latest run of each stage, from the run log."""

from __future__ import annotations

import time
from pathlib import Path

from descatter.storage.runlog import read_runlog
from descatter.storage.store import SurveyStore

STAGES = ("ingest", "spectra", "stats", "estimate", "apply", "geometry")


def _epoch(record: dict) -> float:
    if "t" in record:
        return float(record["t"])
    return time.mktime(time.strptime(record["time"][:19], "%Y-%m-%dT%H:%M:%S"))


def stage_status(store_path: str | Path) -> list[dict]:
    """Per stage: state, done/total (chunks, or traces for ingest), rate, ETA,
    and the last warnings and errors of its latest run."""
    SurveyStore.open(store_path)  # a clear error for a path that is not a store
    records = list(read_runlog(store_path))
    out = []
    for stage in STAGES:
        starts = [i for i, r in enumerate(records) if r["stage"] == stage and r["event"] == "start"]
        if not starts:
            continue
        i0 = starts[-1]
        start = records[i0]
        run = start["run"]
        later = [r for r in records[i0 + 1:] if r["stage"] == stage and r["run"] == run]
        batches = [r for r in later if r["event"] == "batch"]
        ended = next((r for r in later if r["event"] == "end"), None)
        errors = [r.get("error", "") for r in later if r["event"] == "error"]
        warnings = [r.get("message", "") for r in records[i0:] if r["event"] == "warning" and r["run"] == run]
        if stage == "estimate":  # a stage of stages: its progress is spectra's and stats'
            done, total, unit = (1, 1, "solve") if ended else (0, 1, "solve")
        elif stage == "ingest":
            done, total, unit = sum(r.get("traces", 0) for r in batches), start.get("traces"), "traces"
        else:
            done, total = len(batches), start.get("chunks") or start.get("jobs")
            unit = "jobs" if stage == "stats" else "chunks"
        t_start = _epoch(start)
        t_last = _epoch(ended or (batches[-1] if batches else start))
        elapsed = max(t_last - t_start, 1e-3)
        rate = done / elapsed if done else 0.0
        state = "failed" if errors else "finished" if ended else "running or interrupted"
        eta = (total - done) / rate if (rate and total and not ended) else None
        out.append({"stage": stage, "run": run, "state": state, "done": done, "total": total, "unit": unit,
                    "started": start["time"], "elapsed_s": elapsed, "rate": rate, "eta_s": eta,
                    # finished by an earlier run: chunks flagged in their batch records; statistics
                    # jobs are not resubmitted at all, and their start record counts them
                    "resumed": sum(bool(r.get("resumed")) for r in batches) + int(
                        start.get("resumed", 0) if stage == "stats" else 0),
                    "warnings": warnings[-3:], "errors": errors[-3:]})
    return out


def status_text(store_path: str | Path) -> str:
    rows = stage_status(store_path)
    if not rows:
        return f"{store_path}: no run recorded yet"
    lines = []
    for r in rows:
        total = "?" if r["total"] is None else r["total"]
        line = (f"{r['stage']:<9} {r['state']:<22} {r['done']}/{total} {r['unit']}"
                f"  {r['rate']:.1f} {r['unit']}/s  started {r['started']}")
        if r["resumed"]:
            line += f"  ({r['resumed']} resumed)"
        if r["eta_s"] is not None:
            line += f"  ETA {r['eta_s']:.0f} s"
        lines.append(line)
        lines += [f"    warning: {w}" for w in r["warnings"]]
        lines += [f"    error: {e}" for e in r["errors"]]
    return "\n".join(lines)
