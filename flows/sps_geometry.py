"""``descatter geometry --sps``: rebuild the store's geometry from SEG SPS files.

Every committed swath's traces are joined to the SPS relation records by
field record and channel; the SPS positions replace the header positions,
disagreements are reported largest first, and the station tables are
rebuilt in manifest order (the same tables an incremental ingest of the
swaths in that order gives). Later ingests use the recorded SPS files.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from descatter.tasks.swath_geometry import swath_geometry
from descatter.storage.lock import StoreLock
from descatter.storage.runlog import RunLog
from descatter.storage.sps import compare_with_headers, read_sps, sps_trace_geometry
from descatter.storage.stations import write_qc_flags, write_stations, write_swath_geometry
from descatter.storage.store import SurveyStore
from descatter.tasks.config import SurveyConfig
from descatter.tasks.trace_qc import FLAG_BITS

log = logging.getLogger(__name__)

SAMPLE_BITS = FLAG_BITS["dead"] | FLAG_BITS["nan"] | FLAG_BITS["clipped"]


def stored_sample_flags(store: SurveyStore, swath: str) -> np.ndarray:
    """The sample bits (dead, NaN, clipped) of a swath's stored QC flags, uint16 [n]:
    what its ingest chunks found, whatever geometry flags were joined to them since."""
    return store.array(swath, "qc_flags")[:] & np.uint16(SAMPLE_BITS)


@dataclass
class SpsReport:
    traces: int = 0
    disagreements: list[dict] = field(default_factory=list)  # largest first, all swaths
    n_disagreeing: int = 0
    warnings: list[str] = field(default_factory=list)


def apply_sps_geometry(store_path: str | Path, paths: list[Path], config: SurveyConfig, *,
                       report_rows: int = 10) -> SpsReport:
    store_path = Path(store_path)
    report = SpsReport()
    with StoreLock(store_path, command="geometry"):
        store = SurveyStore.open(store_path, writable=True)
        runlog = RunLog(store_path)
        sps = read_sps(*paths, revision=config.geometry.sps_revision,
                       columns=config.geometry.sps_columns or None)
        known = {"sources": np.zeros(0, np.int64), "receivers": np.zeros(0, np.int64)}
        built = []
        # Everything is computed before anything is written.
        for rec in store.manifest():
            headers = store.headers(rec.name)
            tg = sps_trace_geometry(sps, headers["field_record"], headers["channel"])
            dis = compare_with_headers(tg, source_x=headers["source_x"], source_y=headers["source_y"],
                                       receiver_x=headers["receiver_x"], receiver_y=headers["receiver_y"],
                                       tolerance_m=config.geometry.offset_tolerance_m)
            report.n_disagreeing += len(dis["trace"])
            for i in range(min(report_rows, len(dis["trace"]))):
                report.disagreements.append({"swath": rec.name, **{k: v[i].item() for k, v in dis.items()}})
            flags = stored_sample_flags(store, rec.name)
            geom = swath_geometry(rec.name, headers, flags, config, known_sources=known["sources"],
                                  known_receivers=known["receivers"], sps=tg)
            known["sources"] = np.concatenate([known["sources"], geom.new_sources["key"]])
            known["receivers"] = np.concatenate([known["receivers"], geom.new_receivers["key"]])
            built.append((rec, geom))
            report.traces += rec.n_traces
            report.warnings += geom.warnings
        report.disagreements.sort(key=lambda r: -r["error_m"])
        report.disagreements = report.disagreements[:report_rows]
        store.set_attrs(geometry_state="rebuilding")
        counts = {"sources": 0, "receivers": 0}
        for rec, geom in built:
            counts["sources"] = write_stations(store, "sources", geom.new_sources, start=counts["sources"])
            counts["receivers"] = write_stations(store, "receivers", geom.new_receivers, start=counts["receivers"])
            write_swath_geometry(store, rec.name, geom.arrays, chunk_traces=rec.chunk_traces)
            write_qc_flags(store, rec.name, geom.flags)
        store.set_station_counts(counts)
        store.set_attrs(geometry_state="ok", geometry_source="sps",
                        sps_files=[str(Path(p).resolve()) for p in paths])
        runlog.write("geometry", "end", source="sps", traces=report.traces,
                     disagreeing=report.n_disagreeing, stations=counts)
    return report
