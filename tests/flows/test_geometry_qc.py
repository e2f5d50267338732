"""Geometry and trace QC built at ingest, on the tiny synthetic survey."""

from __future__ import annotations

import struct
from pathlib import Path

import numpy as np
import pytest

from descatter.flows.ingest import ingest_swaths
from descatter.flows.qc import write_qc_report
from descatter.storage.arrays_file import read_arrays
from descatter.storage.config_file import load_config
from descatter.storage.stations import read_qc_flags, read_stations, read_swath_geometry
from descatter.storage.store import SurveyStore
from descatter.storage.tables import read_csv
from descatter.tasks.errors import TraceQcError
from descatter.tasks.trace_qc import FLAG_BITS


def _lines(survey: Path) -> list[Path]:
    return sorted(survey.glob("line*.sgy"))


def test_stations_match_the_synthetic_truth(tiny_survey, client, tmp_path):
    store_path = tmp_path / "s.zarr"
    ingest_swaths(store_path, _lines(tiny_survey), load_config(tiny_survey / "survey.toml"), client=client)
    store = SurveyStore.open(store_path)
    truth = read_arrays(tiny_survey / "truth.npz")
    for kind, prefix in (("sources", "source"), ("receivers", "receiver")):
        table = read_stations(store, kind)
        assert len(table["key"]) == len(truth[f"{prefix}_x"])
        # every true station found at its position (headers hold centimetres)
        order = np.lexsort((table["y"], table["x"]))
        t_order = np.lexsort((truth[f"{prefix}_y"], truth[f"{prefix}_x"]))
        assert np.allclose(table["x"][order], truth[f"{prefix}_x"][t_order], rtol=0, atol=0.01)
        assert np.allclose(table["y"][order], truth[f"{prefix}_y"][t_order], rtol=0, atol=0.01)
    g = read_swath_geometry(store, "line01")
    src, rcv = read_stations(store, "sources"), read_stations(store, "receivers")
    # offsets and azimuths against numpy.hypot / numpy.arctan2 on the station coordinates
    dx = rcv["x"][g["receiver_index"]] - src["x"][g["source_index"]]
    dy = rcv["y"][g["receiver_index"]] - src["y"][g["source_index"]]
    assert np.allclose(g["offset"], np.hypot(dx, dy), rtol=0, atol=0.02)
    az = np.degrees(np.arctan2(g["receiver_x"] - g["source_x"], g["receiver_y"] - g["source_y"])) % 360
    assert np.allclose(g["azimuth"], az)
    assert len(np.unique(g["shot"])) == 8  # 8 shots on one source line of the tiny survey
    assert not read_qc_flags(store, "line01").any()


def test_swath_order_does_not_change_station_ids(tiny_survey, client, tmp_path):
    cfg = load_config(tiny_survey / "survey.toml")
    tables = []
    for name, order in (("ab", _lines(tiny_survey)), ("ba", _lines(tiny_survey)[::-1])):
        path = tmp_path / f"{name}.zarr"
        for line in order:
            ingest_swaths(path, [line], cfg, client=client)
        store = SurveyStore.open(path)
        tables.append({k: read_stations(store, k) for k in ("sources", "receivers")})
        # each swath's traces name the same station keys, whatever the order
        for line in _lines(tiny_survey):
            g = read_swath_geometry(store, line.stem, ["source_index", "receiver_index"])
            tables[-1][line.stem] = (tables[-1]["sources"]["key"][g["source_index"]],
                                     tables[-1]["receivers"]["key"][g["receiver_index"]])
    a, b = tables
    for kind in ("sources", "receivers"):
        ia, ib = np.argsort(a[kind]["key"]), np.argsort(b[kind]["key"])
        assert np.array_equal(a[kind]["key"][ia], b[kind]["key"][ib])
        assert np.array_equal(a[kind]["x"][ia], b[kind]["x"][ib])
    for line in _lines(tiny_survey):
        assert np.array_equal(a[line.stem][0], b[line.stem][0])
        assert np.array_equal(a[line.stem][1], b[line.stem][1])


def _plant_faults(src: Path, dst: Path) -> dict[str, int]:
    raw = bytearray(src.read_bytes())
    ns = struct.unpack(">H", raw[3220:3222])[0]
    tb = 240 + 4 * ns

    def head(i: int) -> int:
        return 3600 + i * tb

    def put_i32(i: int, byte: int, value: int) -> None:  # SEG-Y rev 1: 1-based byte positions
        raw[head(i) + byte - 1: head(i) + byte + 3] = struct.pack(">i", value)

    def get_i32(i: int, byte: int) -> int:
        return struct.unpack(">i", raw[head(i) + byte - 1: head(i) + byte + 3])[0]

    def samples(i: int) -> np.ndarray:
        return np.frombuffer(bytes(raw[head(i) + 240: head(i) + tb]), ">f4").copy()

    def put_samples(i: int, values: np.ndarray) -> None:
        raw[head(i) + 240: head(i) + tb] = values.astype(">f4").tobytes()

    put_samples(5, np.zeros(ns))                                   # dead
    s = samples(10); s[50] = np.nan; put_samples(10, s)            # nan
    for byte in (81, 85, 37):                                      # duplicate of trace 19
        put_i32(20, byte, get_i32(19, byte))
    for byte in (73, 77, 81, 85):                                  # zero_xy
        put_i32(30, byte, 0)
    put_i32(40, 37, get_i32(40, 37) + 100)                         # offset_mismatch (100 m)
    s = samples(50); peak = np.abs(s).max() * 3; s[100:108] = peak; put_samples(50, s)  # clipped
    dst.write_bytes(bytes(raw))
    return {"dead": 5, "nan": 10, "duplicate": 20, "zero_xy": 30, "offset_mismatch": 40, "clipped": 50}


def test_each_planted_fault_is_caught_and_nothing_else(tiny_survey, client, tmp_path):
    planted = _plant_faults(_lines(tiny_survey)[0], tmp_path / "line01.sgy")
    store_path = tmp_path / "s.zarr"
    cfg = load_config(tiny_survey / "survey.toml")
    ingest_swaths(store_path, [tmp_path / "line01.sgy"], cfg, client=client)
    flags = read_qc_flags(SurveyStore.open(store_path), "line01")
    expected = np.zeros_like(flags)
    for name, trace in planted.items():
        expected[trace] = FLAG_BITS[name]
    assert np.array_equal(flags, expected)
    n = write_qc_report(store_path, tmp_path / "bad.csv")
    header, rows = read_csv(tmp_path / "bad.csv")
    assert header == ["swath", "trace", "field_record", "channel", "flags"]
    assert n == len(rows) == 6
    assert {int(r[1]): r[4] for r in rows} == {t: name for name, t in planted.items()}
    # a zero_xy trace gets no station
    g = read_swath_geometry(SurveyStore.open(store_path), "line01", ["source_index"])
    assert g["source_index"][30] == -1 and (np.delete(g["source_index"], 30) >= 0).all()


def test_error_policy_refuses_the_swath(tiny_survey, client, tmp_path):
    _plant_faults(_lines(tiny_survey)[0], tmp_path / "line01.sgy")
    cfg = load_config(tiny_survey / "survey.toml")
    cfg.qc.nan = "error"
    store_path = tmp_path / "s.zarr"
    with pytest.raises(TraceQcError, match=r"line01.*trace \[10\]"):
        ingest_swaths(store_path, [tmp_path / "line01.sgy"], cfg, client=client)
    store = SurveyStore.open(store_path)
    assert store.swath_names() == [] and store.station_counts() == {"sources": 0, "receivers": 0}
    assert not (store_path / "swaths" / "line01").exists()


def test_exclusions_are_honoured(tiny_survey, client, tmp_path):
    cfg = load_config(tiny_survey / "survey.toml")
    lines = _lines(tiny_survey)
    store_path = tmp_path / "s.zarr"
    ingest_swaths(store_path, lines[:1], cfg, client=client)
    store = SurveyStore.open(store_path)
    h = store.headers("line01", ["field_record"])
    rcv = read_stations(store, "receivers")
    record = int(h["field_record"][0])
    cfg2 = cfg.model_copy(deep=True)
    cfg2.qc = cfg.qc.model_validate({
        "exclude_field_records": [record],
        "exclude_traces": [{"swath": "line02", "start": 0, "stop": 5}],
        "exclude_receivers": [{"x": float(rcv["x"][3]), "y": float(rcv["y"][3])}],
    })
    path2 = tmp_path / "s2.zarr"
    ingest_swaths(path2, lines[:2], cfg2, client=client)
    s2 = SurveyStore.open(path2)
    ex = FLAG_BITS["excluded"]
    f1, f2 = read_qc_flags(s2, "line01"), read_qc_flags(s2, "line02")
    g1 = read_swath_geometry(s2, "line01", ["receiver_index"])
    r2 = read_stations(s2, "receivers")
    at_rcv = (np.abs(r2["x"][g1["receiver_index"]] - rcv["x"][3]) < 0.01) & (
        np.abs(r2["y"][g1["receiver_index"]] - rcv["y"][3]) < 0.01)
    assert at_rcv.sum() == 8  # the receiver records every shot of the line
    assert np.array_equal(f1 == ex, (s2.headers("line01", ["field_record"])["field_record"] == record) | at_rcv)
    assert (f2[:5] == ex).all()


@pytest.fixture(scope="module")
def sps_survey(tmp_path_factory) -> Path:
    from descatter.flows.synth import write_synthetic_survey

    out = tmp_path_factory.mktemp("sps_survey")
    write_synthetic_survey(out, scenario="statics", size="tiny", seed=4, sps=True)
    return out


def test_sps_geometry_agrees_with_headers_and_reports_conflicts(sps_survey, client, tmp_path):
    from descatter.flows.sps_geometry import apply_sps_geometry

    cfg = load_config(sps_survey / "survey.toml")
    lines = _lines(sps_survey)
    store_path = tmp_path / "s.zarr"
    ingest_swaths(store_path, lines[:2], cfg, client=client)
    store = SurveyStore.open(store_path)
    from_headers = {k: read_stations(store, k) for k in ("sources", "receivers")}
    # move one receiver by 10 m in the R file: the conflict must come first in the report
    r_text = (sps_survey / "survey.r").read_text().splitlines(keepends=True)
    line = r_text[5]
    east = float(line[46:55])  # SEG SPS rev 2.1 easting, columns 47-55
    r_text[5] = line[:46] + f"{east + 10:9.1f}" + line[55:]
    moved = tmp_path / "moved.r"
    moved.write_text("".join(r_text))
    report = apply_sps_geometry(store_path, [sps_survey / "survey.s", moved, sps_survey / "survey.x"], cfg)
    assert report.n_disagreeing == 2 * 8  # that receiver heard the 8 shots of each of 2 lines
    assert report.disagreements[0]["error_m"] == pytest.approx(10, abs=0.06)
    store = SurveyStore.open(store_path)
    for kind in ("sources", "receivers"):
        t = read_stations(store, kind)
        assert len(t["key"]) == len(from_headers[kind]["key"])
    # a later swath's ingest takes its geometry from the recorded SPS files
    ingest_swaths(store_path, lines[2:], cfg, client=client)
    store = SurveyStore.open(store_path)
    g = read_swath_geometry(store, lines[2].stem, ["receiver_x", "receiver_index"])
    rcv = read_stations(store, "receivers")
    assert np.allclose(rcv["x"][g["receiver_index"]], g["receiver_x"], rtol=0, atol=1e-9)
    assert np.isclose(g["receiver_x"], east + 10, rtol=0, atol=0.06).sum() == 8
