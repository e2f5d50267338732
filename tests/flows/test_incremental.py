"""Incremental swaths: adding, removing and replacing swaths of a store.

A five-swath tiny survey: swaths 1-3 then 4-5 against 1-5 at once, and
swath 3 removed from 1-5 against 1, 2, 4 and 5 alone."""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pytest

from descatter.flows.apply import apply_solution
from descatter.flows.ingest import ingest_swaths
from descatter.flows.solve import estimate_survey
from descatter.flows.swaths import remove_swath_and_update, replace_swath_and_update
from descatter.storage.config_file import load_config
from descatter.storage.estimation import read_solution, stats_keys, write_solution
from descatter.storage.runlog import read_runlog
from descatter.storage.stations import read_stations
from descatter.storage.store import SurveyStore
from descatter.tasks.errors import DescatterError, SwathConflictError


@pytest.fixture(scope="module")
def five(tmp_path_factory) -> tuple[list[Path], object]:
    from descatter.flows.synth import write_synthetic_survey

    rep = write_synthetic_survey(tmp_path_factory.mktemp("five"), size="tiny", n_swaths=5, seed=3)
    return sorted(rep.files), load_config(rep.config)


def _run(store: Path, files, cfg, client) -> dict:
    ingest_swaths(store, files, cfg, client=client)
    est = estimate_survey(store, cfg, client=client)
    return {"estimate": est, "apply": apply_solution(store, cfg, client=client)}


@pytest.fixture(scope="module")
def all_at_once(five, client, tmp_path_factory) -> Path:
    files, cfg = five
    store = tmp_path_factory.mktemp("all") / "s.zarr"
    _run(store, files, cfg, client)
    return store


def _corrected(store: Path) -> dict[str, np.ndarray]:
    s = SurveyStore.open(store)
    return {n: s.array(n, "corrected")[:] for n in s.swath_names()}


def test_swaths_added_later_give_the_same_solution_and_corrected_traces(five, all_at_once, client, tmp_path):
    files, cfg = five
    store = tmp_path / "s.zarr"
    _run(store, files[:3], cfg, client)
    mark = sum(1 for _ in read_runlog(store))
    out = _run(store, files[3:], cfg, client)
    _, want, _ = read_solution(SurveyStore.open(all_at_once))
    _, got, _ = read_solution(SurveyStore.open(store))
    for kind in ("source", "receiver"):
        a, b = read_stations(SurveyStore.open(all_at_once), f"{kind}s"), read_stations(SurveyStore.open(store), f"{kind}s")
        assert np.array_equal(a["key"], b["key"])  # the same stations, in the same order
        # the same statistics summed in the same order: the same solution, bit for bit (measured)
        assert np.array_equal(want[f"{kind}_filter"], got[f"{kind}_filter"])
    # corrected traces: within the re-apply tolerance of the traces kept from the first solution
    tol = cfg.correction.reapply_tolerance
    ref, inc = _corrected(all_at_once), _corrected(store)
    for name in ref:
        err = np.linalg.norm(inc[name] - ref[name], axis=1) / np.maximum(np.linalg.norm(ref[name], axis=1), 1e-30)
        assert err.max() <= 3 * tol, name
    # the second run computed spectra only for the new swaths
    later = list(read_runlog(store))[mark:]
    computed = {r["swath"] for r in later if r["stage"] == "spectra" and r["event"] == "batch" and not r["resumed"]}
    resumed = {r["swath"] for r in later if r["stage"] == "spectra" and r["event"] == "batch" and r["resumed"]}
    assert computed == {"line04", "line05"} and resumed == {"line01", "line02", "line03"}
    assert out["estimate"]["stats_skipped"][:2] == ["line01", "line02"]
    assert "line02+line03" in out["estimate"]["stats_skipped"]


def test_a_new_solution_recorrects_only_traces_whose_filters_changed(all_at_once, five, client, tmp_path):
    files, cfg = five
    store = tmp_path / "s.zarr"
    shutil.copytree(all_at_once, store)
    s = SurveyStore.open(store, writable=True)
    sid, sol, attrs = read_solution(s)
    changed = sol["receiver_filter"].copy()
    moved = [5, 40]
    changed[moved] = np.roll(changed[moved], 3, axis=1)  # a 3-sample shift: far beyond the tolerance
    changed[7] *= 1.001  # 0.1 %: within it
    sid2 = write_solution(s, sol | {"receiver_filter": changed}, attrs)
    before = _corrected(store)
    res = apply_solution(store, cfg, client=client)
    after = _corrected(store)
    touched = {n: np.isin(s.array(n, "geometry/receiver_index")[:], moved) for n in s.swath_names()}
    assert res["solution"] == sid2 and res["recomputed"] == sum(int(t.sum()) for t in touched.values()) > 0
    # the same solution applied from scratch (another store, no earlier correction)
    fresh = tmp_path / "fresh.zarr"
    shutil.copytree(store, fresh)
    for n in s.swath_names():
        shutil.rmtree(fresh / "swaths" / n / "corrected")
        shutil.rmtree(fresh / "checkpoints" / "apply" / n, ignore_errors=True)
    apply_solution(fresh, cfg, client=client)
    full = _corrected(fresh)
    for n, t in touched.items():
        assert np.array_equal(after[n][t], full[n][t])        # re-corrected rows: exactly the new solution's
        assert np.array_equal(after[n][~t], before[n][~t])    # the others kept
        applied = s.array(n, "corrected_solution")[:]
        listed = s.array(n, "corrected").attrs["solutions"]
        assert set(np.asarray(listed)[applied[t]]) == {sid2} and set(np.asarray(listed)[applied[~t]]) == {sid}
    # tolerance 0: every filter that changed at all is re-corrected, measured against the solution
    # that corrected each trace: receiver 7 now (0.2 % since its traces' correction), not 5 and 40
    # (unchanged since theirs)
    cfg0 = cfg.model_copy(deep=True)
    cfg0.correction.reapply_tolerance = 0.0
    changed[7] *= 1.001
    write_solution(s, sol | {"receiver_filter": changed}, attrs)
    res0 = apply_solution(store, cfg0, client=client)
    r7 = sum(int((s.array(n, "geometry/receiver_index")[:] == 7).sum()) for n in s.swath_names())
    assert res0["recomputed"] == r7 > 0


def _solution_by_key(store: Path) -> dict[str, dict]:
    s = SurveyStore.open(store)
    _, sol, _ = read_solution(s)
    out = {}
    for kind in ("source", "receiver"):
        keys = read_stations(s, f"{kind}s")["key"]
        out[kind] = {"key": keys, "filter": sol[f"{kind}_filter"], "identity": sol[f"{kind}_identity"]}
    return out


def test_removing_a_middle_swath_equals_never_having_had_it(five, all_at_once, client, tmp_path):
    files, cfg = five
    store = tmp_path / "s.zarr"
    shutil.copytree(all_at_once, store)
    out = remove_swath_and_update(store, "line03", cfg, client=client)
    assert out["removed"]["was_committed"] and out["removed"]["traces"] > 0
    s = SurveyStore.open(store)
    assert s.swath_names() == ["line01", "line02", "line04", "line05"]
    # nothing of it is left but the run log
    assert not (store / "swaths" / "line03").exists()
    assert not [k for k in stats_keys(store) if "line03" in k.split("+")]
    assert not [p for p in (store / "checkpoints").rglob("*line03*")]
    assert any(r["stage"] == "swath" and r["event"] == "removed" and r["swath"] == "line03" for r in read_runlog(store))
    # the same solution as a survey that never had it, station by station
    never = tmp_path / "never.zarr"
    _run(never, [f for f in files if f.stem != "line03"], cfg, client)
    got, want = _solution_by_key(store), _solution_by_key(never)
    for kind in ("source", "receiver"):
        pos = {k: i for i, k in enumerate(got[kind]["key"].tolist())}
        rows = np.array([pos[k] for k in want[kind]["key"].tolist()])
        live = ~want[kind]["identity"]
        assert np.array_equal(got[kind]["identity"][rows], want[kind]["identity"])
        # the station order differs, so the sparse solves add in another order: float round-off only
        np.testing.assert_allclose(got[kind]["filter"][rows][live], want[kind]["filter"][live], rtol=0, atol=1e-5)
        # stations only the removed swath had: no pairs left, so the identity filter
        only = np.setdiff1d(np.arange(len(got[kind]["key"])), rows)
        assert got[kind]["identity"][only].all()
    with pytest.raises(SwathConflictError, match="no swath 'line03'"):
        remove_swath_and_update(store, "line03", cfg, client=client)


def test_replace_is_remove_and_add_and_refuses_a_bad_file_first(five, all_at_once, client, tmp_path):
    files, cfg = five
    store = tmp_path / "s.zarr"
    shutil.copytree(all_at_once, store)
    bad = tmp_path / "bad" / "line03.sgy"
    bad.parent.mkdir()
    bad.write_bytes(files[2].read_bytes()[:5000])  # truncated inside the first traces
    manifest = (store / "manifest.json").read_bytes()
    with pytest.raises(DescatterError, match="line03.sgy"):
        replace_swath_and_update(store, "line03", bad, cfg, client=client)
    assert (store / "manifest.json").read_bytes() == manifest  # nothing removed
    with pytest.raises(DescatterError, match="named line03"):
        replace_swath_and_update(store, "line03", files[3], cfg, client=client)
    out = replace_swath_and_update(store, "line03", files[2], cfg, client=client)
    assert out["removed"]["was_committed"] and out["ingest"].added == ["line03"]
    s = SurveyStore.open(store)
    assert s.swath_names() == ["line01", "line02", "line04", "line05", "line03"]
    assert s.swath("line03").n_traces == SurveyStore.open(all_at_once).swath("line03").n_traces


def test_swath_command_and_an_incremental_run_through_the_flows(prefect_harness, five, all_at_once, tmp_path):
    from typer.testing import CliRunner

    from descatter.flows.cli import app

    files, _ = five
    store = tmp_path / "s.zarr"
    shutil.copytree(all_at_once, store)
    runner = CliRunner()
    res = runner.invoke(app, ["swath", str(store), "remove", "line05", "--workers", "1"], catch_exceptions=False)
    assert res.exit_code == 0, res.output
    assert "removed line05" in res.stdout and "corrected" in res.stdout
    assert SurveyStore.open(store).swath_names() == ["line01", "line02", "line03", "line04"]
    # the new swath arrives: run is incremental (the committed four are skipped)
    res = runner.invoke(app, ["run", str(store), *map(str, files), "--workers", "1"], catch_exceptions=False)
    assert res.exit_code == 0, res.output
    assert "added ['line05']" in res.stdout and "skipped ['line01', 'line02', 'line03', 'line04']" in res.stdout
    _, want, _ = read_solution(SurveyStore.open(all_at_once))
    _, got, _ = read_solution(SurveyStore.open(store))
    assert np.array_equal(want["receiver_filter"], got["receiver_filter"])
    # bad arguments are refused before anything starts
    with pytest.raises(DescatterError, match="expected 'remove' or 'replace'"):
        runner.invoke(app, ["swath", str(store), "drop", "line05"], catch_exceptions=False)
    with pytest.raises(DescatterError, match="give the new SEG-Y file"):
        runner.invoke(app, ["swath", str(store), "replace", "line05"], catch_exceptions=False)
