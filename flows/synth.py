"""``descatter synth``: write a synthetic survey with known truth to disk.

The numbers come from :mod:`descatter.tasks.synthetic` (pure); this module
only writes them, block by block, through storage: one SEG-Y file per
source line (``lineNN.sgy``), ``survey.toml`` (a config matching the
survey) and ``truth.npz`` (keys in ``tasks.synthetic.TRUTH_KEYS``).
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np

from descatter.storage.arrays_file import truth_path, write_arrays
from descatter.storage.atomic import write_bytes_atomic
from descatter.storage.config_file import dump_config
from descatter.storage.segy_write import (
    SegyWriter, build_binary_header, build_textual_header, build_trace_headers,
)
from descatter.storage.sps import SpsPoints, SpsRelations, write_sps
from descatter.tasks import synthetic
from descatter.tasks.geometry import relation_runs
from descatter.tasks.config import AnalysisConfig, EstimateConfig, HeaderPositions, SurveyConfig

log = logging.getLogger(__name__)

BLOCK_TRACES = 1000
# Clean traces go into truth.npz only while they stay small.
MAX_CLEAN_SAMPLES = 60_000_000
COORDINATE_SCALAR = -100  # centimetre precision in the integer header fields


@dataclass
class SynthReport:
    files: list[Path] = field(default_factory=list)
    traces: int = 0
    config: Path | None = None
    truth: Path | None = None
    sps: tuple[Path, Path, Path] | None = None
    spec: object = None


def _textual(spec, swath: int, n_traces: int) -> bytes:
    lines = [
        "DESCATTER SYNTHETIC LAND SURVEY - NOT FIELD DATA",
        f"SCENARIO {spec.scenario.upper()}  SEED {spec.seed}  SOURCE LINE {swath + 1}",
        f"TRACES {n_traces}  SAMPLES {spec.n_samples}  INTERVAL {spec.dt_s * 1e6:.0f} US",
        "COORDINATES IN METRES, SCALAR -100 (BYTES 71-72)",
        "SAMPLE FORMAT 5 (IEEE FLOAT)",
    ]
    return build_textual_header(lines)


def _trace_headers(geom, sl: slice, spec, layout: dict[str, tuple[int, int]]) -> np.ndarray:
    n = len(geom.field_record[sl])
    s = -COORDINATE_SCALAR

    def scaled(values) -> np.ndarray:
        return np.rint(np.asarray(values[sl], dtype=np.float64) * s).astype(np.int64)

    fields = {
        "field_record": geom.field_record[sl],
        "channel": geom.channel[sl],
        "energy_source_point": geom.energy_source_point[sl],
        "offset": np.rint(geom.offset[sl]).astype(np.int64),
        "receiver_elevation": scaled(geom.receiver_elevation),
        "source_elevation": scaled(geom.source_elevation),
        "elevation_scalar": np.full(n, COORDINATE_SCALAR),
        "coordinate_scalar": np.full(n, COORDINATE_SCALAR),
        "source_x": scaled(geom.source_x),
        "source_y": scaled(geom.source_y),
        "receiver_x": scaled(geom.receiver_x),
        "receiver_y": scaled(geom.receiver_y),
        "coordinate_units": np.ones(n, dtype=np.int64),
        "delay_ms": np.zeros(n, dtype=np.int64),
        "n_samples": np.full(n, spec.n_samples),
        "interval_us": np.full(n, int(round(spec.dt_s * 1e6))),
    }
    return build_trace_headers(fields, layout, n)


def survey_config(spec) -> SurveyConfig:
    """The config that suits a synthetic survey (velocity, window, band, radii)."""
    return SurveyConfig(
        estimate=EstimateConfig(receiver_radius_m=float(spec.receiver_pair_radius_m),
                                source_radius_m=float(spec.source_pair_radius_m)),
        analysis=AnalysisConfig(
            velocity=[tuple(map(float, p)) for p in spec.velocity],
            window_start_s=float(spec.window_s[0]),
            window_end_s=float(spec.window_s[1]),
            band_hz=(float(spec.band_hz[0]), float(spec.band_hz[1])),
            near_surface_velocity_mps=float(spec.near_surface_velocity_mps),
        )
    )


def write_synthetic_survey(
    out: str | Path,
    *,
    scenario: str = "scatter",
    n_swaths: int | None = None,
    size: str | None = "tiny",
    n_traces: int | None = None,
    seed: int = 0,
    sps: bool = False,
    progress: Callable[[int, int], None] | None = None,
) -> SynthReport:
    """Write the survey to ``out`` and return what was written."""
    spec = synthetic.synthetic_spec(size=size, n_traces=n_traces, n_swaths=n_swaths,
                                    scenario=scenario, seed=seed)
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    tables = synthetic.stations(spec)
    truth = synthetic.station_truth(spec)
    counts = synthetic.n_traces_per_swath(spec)
    total = sum(counts)
    keep_clean = total * spec.n_samples <= MAX_CLEAN_SAMPLES
    clean_parts = []
    layout = HeaderPositions().layout()
    report = SynthReport(spec=spec)
    binary = build_binary_header(sample_interval_us=int(round(spec.dt_s * 1e6)),
                                 n_samples=spec.n_samples, format_code=5)
    done = 0
    relations = []
    for swath, n in enumerate(counts):
        geom = synthetic.swath_traces(spec, swath)
        if sps:
            relations.append(_relations(geom, tables))
        path = out / f"line{swath + 1:02d}.sgy"
        with SegyWriter(path, textual=_textual(spec, swath, n), binary=binary,
                        n_samples=spec.n_samples, sample_format="ieee") as writer:
            for a in range(0, n, BLOCK_TRACES):
                sl = slice(a, min(a + BLOCK_TRACES, n))
                samples = synthetic.synthesize(spec, truth, geom.source_index[sl], geom.receiver_index[sl])
                writer.write(_trace_headers(geom, sl, spec, layout), samples)
                if keep_clean:
                    clean_parts.append(synthetic.synthesize(
                        spec, truth, geom.source_index[sl], geom.receiver_index[sl],
                        station_filters=False, noise=False))
                done += sl.stop - sl.start
                if progress:
                    progress(done, total)
        report.files.append(path)
        report.traces += n
        log.info("wrote %s (%d traces)", path, n)
    cfg_text = (
        f"# Config matching the synthetic survey in this folder (scenario {spec.scenario}, "
        f"seed {spec.seed}).\n" + dump_config(survey_config(spec))
    )
    report.config = out / "survey.toml"
    write_bytes_atomic(report.config, cfg_text.encode())
    arrays = synthetic.truth_arrays(spec, truth, tables)
    if keep_clean:
        arrays["clean"] = np.concatenate(clean_parts, axis=0)
    report.truth = write_arrays(truth_path(out), arrays)
    if sps:
        report.sps = _write_sps(out, tables, relations)
    return report


def _relations(geom, tables) -> dict[str, np.ndarray]:
    """X-record runs of one swath, with each record's source station."""
    rcv = tables.receivers
    runs = relation_runs(geom.field_record, geom.channel, rcv.line[geom.receiver_index],
                         rcv.number[geom.receiver_index])
    first = np.searchsorted(geom.field_record, runs["field_record"]) if np.all(
        np.diff(geom.field_record) >= 0) else np.array(
        [np.flatnonzero(geom.field_record == r)[0] for r in runs["field_record"]])
    src = geom.source_index[first]
    runs["source_line"] = tables.sources.line[src].astype(float)
    runs["source_point"] = tables.sources.number[src].astype(float)
    return runs


def _write_sps(out: Path, tables, relations: list[dict[str, np.ndarray]]) -> tuple[Path, Path, Path]:
    def points(kind: str, t) -> SpsPoints:
        return SpsPoints(kind, line=t.line.astype(float), point=t.number.astype(float),
                         point_index=np.ones(len(t.x), np.int64), easting=t.x, northing=t.y,
                         elevation=t.elevation)

    x = {k: np.concatenate([r[k] for r in relations]) for k in relations[0]}
    n = len(x["field_record"])
    rel = SpsRelations(
        field_record=x["field_record"], field_record_increment=np.ones(n, np.int64),
        source_line=x["source_line"], source_point=x["source_point"], source_index=np.ones(n, np.int64),
        from_channel=x["from_channel"], to_channel=x["to_channel"], channel_increment=np.ones(n, np.int64),
        receiver_line=x["receiver_line"].astype(float), from_receiver=x["from_receiver"].astype(float),
        to_receiver=x["to_receiver"].astype(float), receiver_index=np.ones(n, np.int64),
    )
    return write_sps([out / "survey.s", out / "survey.r", out / "survey.x"],
                     points("S", tables.sources), points("R", tables.receivers), rel)
