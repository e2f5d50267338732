"""Ingest and export end to end on a tiny synthetic survey, checked against
segyio as an independent SEG-Y implementation."""

from __future__ import annotations

import hashlib
import os
import re
import shutil
import struct
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import segyio

from descatter.flows.export import export_segy
from descatter.flows.ingest import ingest_swaths
from descatter.storage.config_file import load_config
from descatter.storage.runlog import read_runlog
from descatter.storage.segy_check import compare_with_store
from descatter.storage.store import SurveyStore
from descatter.tasks.config import SurveyConfig
from descatter.tasks.errors import SegyFormatError, SwathConflictError


def _cfg(survey: Path, chunk: int = 256) -> SurveyConfig:
    cfg = load_config(survey / "survey.toml")
    cfg.ingest.chunk_traces = chunk
    return cfg


def _lines(survey: Path) -> list[Path]:
    return sorted(survey.glob("line*.sgy"))


def _tree_digest(root: Path) -> dict[str, str]:
    """Every file under a store with its content hash (run log excluded)."""
    out = {}
    for p in sorted(root.rglob("*")):
        if p.is_file() and p.name != "runlog.jsonl":
            out[str(p.relative_to(root))] = hashlib.blake2b(p.read_bytes(), digest_size=8).hexdigest()
    return out


def _arrays(store: SurveyStore) -> dict[str, np.ndarray]:
    out = {}
    for rec in store.manifest():
        for key in ["traces", "trace_headers"] + [f"headers/{f}" for f in store.header_fields(rec.name)]:
            out[f"{rec.name}/{key}"] = store.array(rec.name, key)[:]
    return out


@pytest.fixture(scope="module")
def ingested(tiny_survey, client, tmp_path_factory):
    store = tmp_path_factory.mktemp("ingested") / "s.zarr"
    report = ingest_swaths(store, _lines(tiny_survey), _cfg(tiny_survey), client=client)
    return store, report


def test_ingest_matches_segyio(ingested, tiny_survey):
    store_path, report = ingested
    store = SurveyStore.open(store_path)
    assert report.added == [p.stem for p in _lines(tiny_survey)]
    for path in _lines(tiny_survey):
        # segyio (independent reader): samples and header fields equal
        with segyio.open(str(path), ignore_geometry=True) as f:
            f.mmap()
            assert np.array_equal(store.array(path.stem, "traces")[:], f.trace.raw[:])
            ffid = f.attributes(segyio.TraceField.FieldRecord)[:]
            chan = f.attributes(segyio.TraceField.TraceNumber)[:]
            scal = f.attributes(segyio.TraceField.SourceGroupScalar)[:]
            gx = f.attributes(segyio.TraceField.GroupX)[:]
            assert store.attrs["n_samples"] == len(f.samples)
            assert store.attrs["sample_interval_s"] == pytest.approx(segyio.tools.dt(f) * 1e-6)
        h = store.headers(path.stem)
        assert np.array_equal(h["field_record"], ffid)
        assert np.array_equal(h["channel"], chan)
        # SEG-Y rev 1: a negative scalar divides
        expect_gx = np.where(scal < 0, gx / np.abs(scal), gx * np.where(scal == 0, 1, scal))
        assert np.allclose(h["receiver_x"], expect_gx, rtol=0, atol=1e-9)
    assert len(store.survey_array().chunks[0]) == sum(len(r.chunk_bounds()) for r in store.manifest())


def test_one_by_one_equals_together_and_reingest_is_noop(ingested, tiny_survey, client, tmp_path):
    together = SurveyStore.open(ingested[0])
    path = tmp_path / "one.zarr"
    for line in _lines(tiny_survey):
        ingest_swaths(path, [line], _cfg(tiny_survey), client=client)
    one = SurveyStore.open(path)
    a, b = _arrays(together), _arrays(one)
    assert a.keys() == b.keys()
    assert all(np.array_equal(a[k], b[k]) for k in a)
    assert [r.fingerprint for r in one.manifest()] == [r.fingerprint for r in together.manifest()]
    before = _tree_digest(path)
    report = ingest_swaths(path, _lines(tiny_survey)[:2], _cfg(tiny_survey), client=client)
    assert report.added == [] and report.skipped == [p.stem for p in _lines(tiny_survey)[:2]]
    assert _tree_digest(path) == before


def test_different_file_under_committed_name_is_refused(ingested, survey_copy, client, tmp_path):
    store = tmp_path / "s.zarr"
    shutil.copytree(ingested[0], store)
    before = _tree_digest(store)
    line = _lines(survey_copy)[0]
    raw = bytearray(line.read_bytes())
    raw[3600 + 8] ^= 0xFF  # another field record in the first trace header
    line.write_bytes(bytes(raw))
    with pytest.raises(SwathConflictError, match="different file is already committed"):
        ingest_swaths(store, [line], _cfg(survey_copy), client=client)
    assert _tree_digest(store) == before


def _bad_inputs(src: Path, tmp: Path) -> dict[str, tuple[Path, str]]:
    raw = src.read_bytes()
    ns = struct.unpack(">H", raw[3220:3222])[0]
    tb = 240 + 4 * ns
    cases = {}

    def put(name, data, match):
        p = tmp / f"{name}.sgy"
        p.write_bytes(data)
        cases[name] = (p, match)

    put("truncated", raw[: 3600 + 5 * tb + 100], "truncated")
    put("foreign", b"%PDF-1.4 " + bytes(5000), "not a SEG-Y")
    put("empty", raw[:3600], "no traces")
    bad_fmt = bytearray(raw)
    bad_fmt[3224:3226] = struct.pack(">H", 4)  # format 4: fixed-point with gain, withdrawn in rev 1
    put("format4", bytes(bad_fmt), "format")
    bad_ns = bytearray(raw)
    bad_ns[3600 + 3 * tb + 114: 3600 + 3 * tb + 116] = struct.pack(">H", ns + 1)  # trace 3 says ns+1
    put("trace_ns", bytes(bad_ns), "trace 3")
    return cases


@pytest.mark.parametrize("case", ["truncated", "foreign", "empty", "format4", "trace_ns"])
def test_bad_input_names_file_and_leaves_store_unchanged(case, ingested, tiny_survey, client, tmp_path):
    store = tmp_path / "s.zarr"
    shutil.copytree(ingested[0], store)
    before = _tree_digest(store)
    path, match = _bad_inputs(_lines(tiny_survey)[0], tmp_path)[case]
    with pytest.raises(SegyFormatError) as info:
        ingest_swaths(store, [path], _cfg(tiny_survey), client=client)
    assert str(path) in str(info.value)
    assert match in str(info.value)
    assert _tree_digest(store) == before


@pytest.mark.parametrize("n_samples, interval_us, match", [(100, 4000, "samples per trace"),
                                                         (250, 2000, "sample interval 2 ms")])
def test_other_sampling_refused(n_samples, interval_us, match, tiny_survey, ingested, client, tmp_path):
    store = tmp_path / "s.zarr"
    shutil.copytree(ingested[0], store)
    before = _tree_digest(store)
    other = tmp_path / "resampled.sgy"
    spec = segyio.spec()  # segyio as an independent writer
    spec.format, spec.samples, spec.tracecount = 5, list(range(n_samples)), 4
    with segyio.create(str(other), spec) as f:
        for i in range(4):
            f.header[i] = {segyio.TraceField.TRACE_SAMPLE_COUNT: n_samples,
                           segyio.TraceField.TRACE_SAMPLE_INTERVAL: interval_us}
            f.trace[i] = np.zeros(n_samples, "float32")
        f.bin.update({segyio.BinField.Interval: interval_us})
    with pytest.raises(SwathConflictError, match=match) as info:
        ingest_swaths(store, [other], _cfg(tiny_survey), client=client)
    assert str(other) in str(info.value)
    assert _tree_digest(store) == before


def test_killed_ingest_leaves_store_as_before_and_rerun_completes(prefect_harness, tiny_survey, ingested, tmp_path):
    store = tmp_path / "s.zarr"
    lines = _lines(tiny_survey)
    cfg_path = tmp_path / "c.toml"
    text = (tiny_survey / "survey.toml").read_text()
    cfg_path.write_text(re.sub(r"chunk_traces = \d+", "chunk_traces = 256", text))
    assert "chunk_traces = 256" in cfg_path.read_text()  # several chunks a swath, so the kill lands mid-swath
    cmd = [sys.executable, "-m", "descatter.flows.cli", "ingest", str(store), *map(str, lines),
           "--config", str(cfg_path), "--workers", "1"]
    env = {**os.environ, "DESCATTER_FAULT": "ingest:3"}
    proc = subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=300, start_new_session=True)
    assert proc.returncode == -9, proc.stderr
    assert SurveyStore.open(store).swath_names() == []  # nothing committed, readers see no half swath
    proc = subprocess.run(cmd, capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    again, full = _arrays(SurveyStore.open(store)), _arrays(SurveyStore.open(ingested[0]))
    assert again.keys() == full.keys() and all(np.array_equal(again[k], full[k]) for k in full)
    batches = [r for r in read_runlog(store) if r["event"] == "batch"]
    assert sum(r["resumed"] for r in batches) >= 3  # the finished chunks were not redone
    assert not list(store.rglob("*.partial"))


def test_export_round_trips(ingested, tiny_survey, tmp_path):
    store_path, _ = ingested
    out = tmp_path / "all.sgy"
    export_segy(store_path, out)
    assert compare_with_store(out, store_path) == []
    # per swath: byte-identical to the (IEEE, big-endian) input, one writer or several at once
    for threads in (1, 3):
        seen = []
        export_segy(store_path, tmp_path / f"per{threads}", per_swath=True, threads=threads,
                    progress=lambda done, total: seen.append((done, total)))
        for line in _lines(tiny_survey):
            assert (tmp_path / f"per{threads}" / line.name).read_bytes() == line.read_bytes()
        assert seen[-1][0] == seen[-1][1] and [d for d, _ in seen] == sorted(d for d, _ in seen)
    # IBM export read by segyio: equal within IBM precision (6 hex digits: 2**-21 relative)
    export_segy(store_path, tmp_path / "ibm.sgy", sample_format="ibm")
    store = SurveyStore.open(store_path)
    with segyio.open(str(tmp_path / "ibm.sgy"), ignore_geometry=True) as f:
        assert int(f.bin[segyio.BinField.Format]) == 1
        ours = store.survey_array().compute()
        theirs = f.trace.raw[:]
    assert np.allclose(theirs, ours, rtol=2.0**-20, atol=np.abs(ours).max() * 1e-7)
