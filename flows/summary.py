"""What ``descatter info`` prints: a read-only summary of a store."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from descatter.flows.qc import qc_counts
from descatter.storage.lock import describe_holder, lock_is_stale, read_lock
from descatter.storage.stations import has_geometry, read_stations, read_swath_geometry
from descatter.storage.store import SWATHS, SurveyStore
from descatter.tasks.geometry import acquisition_summary


def store_warnings(store: SurveyStore) -> list[str]:
    warnings = []
    committed = set(store.swath_names())
    swaths_dir = store.path / SWATHS
    if swaths_dir.is_dir():
        for p in sorted(swaths_dir.iterdir()):
            if p.is_dir() and p.name not in committed:
                warnings.append(
                    f"swath {p.name!r} is staged but not committed (an ingest was interrupted; "
                    "rerun it to resume, or it is discarded on the next ingest of another file)"
                )
    holder = read_lock(store.path)
    if holder is not None:
        why = lock_is_stale(holder)
        warnings.append(f"locked by {describe_holder(holder)}" + (f" - stale: {why}" if why else ""))
    if any(store.path.rglob("*.partial")):
        warnings.append("leftover .partial files from a killed write (swept by the next writer)")
    return warnings


def store_summary(path: str | Path) -> str:
    store = SurveyStore.open(path)
    records = store.manifest()
    attrs = store.attrs
    n = sum(r.n_traces for r in records)
    lines = [f"store     {store.path}"]
    if records:
        dt = attrs["sample_interval_s"]
        ns = attrs["n_samples"]
        lines += [
            f"traces    {n}",
            f"samples   {ns} per trace, interval {dt * 1e3:g} ms, length {(ns - 1) * dt:g} s",
            f"swaths    {len(records)}",
        ]
        width = max(len(r.name) for r in records)
        for r in records:
            lines.append(
                f"  {r.name:<{width}}  {r.n_traces:>9} traces  format {r.format_code}  "
                f"{r.byte_order}-endian  {r.size / 1e6:9.1f} MB  {r.file}"
            )
        lines += _geometry_lines(store)
        lines += _solution_lines(store)
        counts = qc_counts(store)
        lines.append("qc flags  " + ("none" if not any(counts.values()) else ""))
        for name, c in counts.items():
            if c:
                lines.append(f"  {name}: " + ", ".join(f"{k} {v}" for k, v in c.items()))
    else:
        lines.append("swaths    none committed yet")
    warnings = store_warnings(store)
    lines.append("warnings  " + ("none" if not warnings else ""))
    lines += [f"  - {w}" for w in warnings]
    return "\n".join(lines)


def _geometry_lines(store: SurveyStore) -> list[str]:
    records = [r for r in store.manifest() if has_geometry(store.path, r.name)]
    if not records:
        return ["geometry  none built"]
    src, rcv = read_stations(store, "sources"), read_stations(store, "receivers")
    fields = ["cmp_x", "cmp_y", "offset", "azimuth", "shot", "source_index"]
    parts = [read_swath_geometry(store, r.name, fields) for r in records]
    g = {f: np.concatenate([p[f] for p in parts]) for f in fields}
    ok = g["source_index"] >= 0
    if not ok.any() or len(src["x"]) < 2 or len(rcv["x"]) < 2:
        return [f"stations  {len(src['key'])} sources, {len(rcv['key'])} receivers (too few for a layout)"]
    a = acquisition_summary(src["x"], src["y"], rcv["x"], rcv["y"], g["cmp_x"][ok], g["cmp_y"][ok],
                            g["offset"][ok], g["azimuth"][ok], g["shot"][ok])
    return [
        f"stations  {len(src['key'])} sources ({a['source_n_lines']:.0f} lines, "
        f"{a['source_station_spacing_m']:g} m apart along, lines {a['source_line_spacing_m']:g} m apart), "
        f"{len(rcv['key'])} receivers ({a['receiver_n_lines']:.0f} lines, "
        f"{a['receiver_station_spacing_m']:g} m along, lines {a['receiver_line_spacing_m']:g} m apart)",
        f"shots     {a['n_shots']:.0f}",
        f"offsets   {a['offset_min_m']:.1f} to {a['offset_max_m']:.1f} m; azimuths "
        f"{a['azimuth_min_deg']:.0f} to {a['azimuth_max_deg']:.0f} deg (coverage {a['azimuth_coverage_deg']:.0f} deg)",
        f"fold      max {a['fold_max']:.0f}, mean {a['fold_mean']:.1f}, median {a['fold_median']:.0f} "
        f"in {a['n_bins']:.0f} CMP bins of {a['bin_inline_m']:g} x {a['bin_crossline_m']:g} m",
    ]


def _solution_lines(store: SurveyStore) -> list[str]:
    from descatter.storage.estimation import list_solutions, solution_attrs

    sid = store.attrs.get("current_solution")
    if not sid or sid not in list_solutions(store):
        return ["solution  none yet (run 'descatter estimate')"]
    a = solution_attrs(store, sid)
    s, c = a["summary"], a.get("components", {})
    out = [f"solution  {sid} (current of {len(list_solutions(store))})"]
    for kind, key in (("receivers", "receiver"), ("sources", "source")):
        g = c.get(kind, {})
        out.append(
            f"  {kind}: {g.get('pairs', 0)} neighbour pairs, {g.get('components_before', '?')} component(s) "
            f"before bridging, {s[f'{key}_components']} solved; {s[f'{key}_identity']} identity filter(s); "
            f"phase residual {s[f'{key}_phase_residual']:.4f}")
    out.append(f"  amplitude residual {s['amplitude_residual_rms']:.4f} (rms of log power)")
    for w in a.get("warnings", []):
        out.append(f"  warning: {w}")
    return out
