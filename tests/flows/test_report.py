"""The QC report on a tiny synthetic scattering survey: the numbers behind
the pictures, recomputed here from the store with the kernels of
descatter.tasks.quality (and scipy.signal.correlate as the reference
correlation), against metrics.json and the page; the comparison with the
survey's truth against the clean traces the synthetic writer stored in
truth.npz."""

from __future__ import annotations

import html
import json
import shutil
from pathlib import Path

import numpy as np
import pytest
import scipy.signal

from descatter.flows.apply import apply_solution
from descatter.flows.cluster import dask_client
from descatter.flows.ingest import ingest_swaths
from descatter.flows.report import write_report
from descatter.flows.solve import estimate_survey
from descatter.flows.stations_table import write_station_table
from descatter.flows.synth import write_synthetic_survey
from descatter.storage.arrays_file import read_arrays
from descatter.storage.config_file import load_config
from descatter.storage.estimation import read_solution
from descatter.storage.stations import read_qc_flags, read_stations, read_swath_geometry
from descatter.storage.store import SurveyStore
from descatter.storage.tables import read_csv
from descatter.tasks.errors import InputNotFoundError
from descatter.tasks.moveout import nmo_correct, window_taper
from descatter.tasks.quality import bandpass, cmp_bin_indices, grouped_semblance, signal_to_noise, spacing_adequacy

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948), file signature


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    root = tmp_path_factory.mktemp("report")
    write_synthetic_survey(root / "survey", scenario="scatter", size="tiny", seed=5)
    cfg = load_config(root / "survey" / "survey.toml")
    store = root / "s.zarr"
    with dask_client("threads") as client:
        ingest_swaths(store, sorted((root / "survey").glob("line*.sgy")), cfg, client=client)
        estimate_survey(store, cfg, client=client)
        apply_solution(store, cfg, client=client)
    result = write_report(store, root / "report")
    metrics = json.loads((root / "report" / "metrics.json").read_text(),
                         parse_constant=lambda c: pytest.fail(f"metrics.json holds {c}: not strict JSON"))
    return {"root": root, "store": store, "config": cfg, "result": result, "metrics": metrics,
            "page": (root / "report" / "index.html").read_text()}


def _independent_semblance(store_path: Path, cfg, array: str):
    """Per shot and per CMP bin, from the store: NMO with the configured
    velocities, zero-phase band limit, window semblance (tasks.quality)."""
    store = SurveyStore.open(store_path)
    a = cfg.analysis
    v = np.asarray(a.velocity, float)
    dt = store.sample_interval_s
    start = int(round(a.window_start_s / dt))
    stop = min(int(round(a.window_end_s / dt)) + 1, store.n_samples)
    shots, cmp_traces, cmp_xy = {}, [], []
    for name in store.swath_names():
        g = read_swath_geometry(store, name)
        live = ((read_qc_flags(store, name) & np.uint16(cfg.qc.exclude_bits())) == 0) & (g["source_index"] >= 0) \
            & (g["receiver_index"] >= 0)
        traces = store.array(name, array)[:][live]
        flat = nmo_correct(traces, offset_m=g["offset"][live], delay_s=store.array(name, "headers/delay_ms")[:][live]
                           * 1e-3, dt_s=dt, velocity_t0_s=v[:, 0], velocity_vrms_mps=v[:, 1],
                           stretch_mute=a.stretch_mute)
        limited = bandpass(flat, dt_s=dt, band_hz=a.band_hz, taper_hz=cfg.correction.band_taper_hz)
        labels, s, count = grouped_semblance(limited, g["shot"][live], start=start, stop=stop)
        for lab, sv, n in zip(labels, s, count):
            shots[(name, int(lab))] = (sv, int(n))
        cmp_traces.append(limited)
        cmp_xy.append(np.column_stack([g["cmp_x"][live], g["cmp_y"][live]]))
    return shots, np.concatenate(cmp_traces), np.concatenate(cmp_xy), (start, stop)


def test_figures_exist_are_png_and_are_on_the_page(built):
    figures = built["result"]["figures"]
    assert {"stations_sources", "stations_receivers", "pair_correlations", "shot_gather", "spectra", "snr",
            "snr_map", "spacing"} <= set(figures)
    assert "truth_correlation" in figures  # a synthetic survey: its truth lies beside the SEG-Y files
    for name, path in figures.items():
        data = Path(path).read_bytes()
        assert data[:8] == PNG_MAGIC, name
        assert len(data) > 10_000, name
        assert f"src='{Path(path).name}'" in built["page"]
    assert not list((built["root"] / "report").glob("*.partial"))


def test_station_values_equal_the_solution_and_the_stations_csv(built, tmp_path):
    m = built["metrics"]["stations"]
    store = SurveyStore.open(built["store"])
    sid, sol, _ = read_solution(store)
    assert built["metrics"]["solution"] == sid == built["result"]["solution"]
    write_station_table(built["store"], tmp_path / "stations.csv")
    header, rows = read_csv(tmp_path / "stations.csv")
    csv = {(r[0], int(r[1])): dict(zip(header, r)) for r in rows}
    for kind, table in (("source", "sources"), ("receiver", "receivers")):
        t = read_stations(store, table)
        assert m[kind]["station"] == t["key"].tolist()
        np.testing.assert_array_equal(m[kind]["x"], t["x"])
        np.testing.assert_array_equal(m[kind]["identity"], sol[f"{kind}_identity"])
        for name in ("scattering_fraction", "static_ms", "amplitude_db", "coherence", "pairs"):
            np.testing.assert_array_equal(m[kind][name], sol[f"{kind}_{name}"])
        for i, key in enumerate(m[kind]["station"]):
            row = csv[(kind, key)]
            assert float(row["x"]) == pytest.approx(m[kind]["x"][i], abs=1e-3)
            assert float(row["y"]) == pytest.approx(m[kind]["y"][i], abs=1e-3)
            for name in ("scattering_fraction", "static_ms", "amplitude_db", "coherence"):
                assert float(row[name]) == pytest.approx(m[kind][name][i], abs=6e-5)
            assert int(row["pairs"]) == m[kind]["pairs"][i]


def test_per_shot_and_cmp_semblance_match_an_independent_recomputation(built):
    m = built["metrics"]
    shots = m["shots"]
    got = {(sw, sh): i for i, (sw, sh) in enumerate(zip(shots["swath"], shots["shot"]))}
    for side, array in (("before", "traces"), ("after", "corrected")):
        ref, traces, xy, (start, stop) = _independent_semblance(built["store"], built["config"], array)
        assert set(got) == set(ref)
        for key, (s, n) in ref.items():
            i = got[key]
            assert shots[f"semblance_{side}"][i] == pytest.approx(s, rel=1e-9, abs=1e-12)
            assert shots["n_traces"][i] == n
            # Neidell & Taner semblance -> S/N for N traces of one signal plus equal-power noise
            assert shots[f"snr_{side}"][i] == pytest.approx(float(signal_to_noise(s, n_traces=n)), rel=1e-9)
        assert m["summary"]["survey"][f"mean_semblance_{side}"] == pytest.approx(np.mean([s for s, _ in ref.values()]))
        c = m["cmp_bins"]
        bins = cmp_bin_indices(xy[:, 0], xy[:, 1], bin_m=tuple(c["bin_m"]), origin=tuple(c["origin"]))
        _, label = np.unique(bins, axis=0, return_inverse=True)
        labels, s, fold = grouped_semblance(traces, label.ravel(), start=start, stop=stop)
        keep = fold >= c["min_fold"]
        np.testing.assert_allclose(np.sort(c[f"semblance_{side}"]), np.sort(s[keep]), rtol=1e-9, atol=1e-12)
        assert sorted(c["fold"]) == sorted(fold[keep].tolist())
    assert m["analysis"]["window_samples"] == [start, stop]


def test_high_scattering_zone_and_the_correction_raising_semblance(built):
    m = built["metrics"]
    _, sol, _ = read_solution(SurveyStore.open(built["store"]))
    frac = sol["source_scattering_fraction"]
    threshold = np.quantile(frac[~sol["source_identity"]], 0.75)  # every source of the tiny survey fires
    shots = m["shots"]
    zone = np.array(shots["source_scattering_fraction"]) >= threshold
    assert shots["high_scattering"] == zone.tolist() and zone.any()
    hz = m["summary"]["high_scattering_zone"]
    assert hz["shots"] == int(zone.sum())
    assert hz["mean_semblance_before"] == pytest.approx(np.mean(np.array(shots["semblance_before"])[zone]))
    assert hz["semblance_ratio"] == pytest.approx(hz["mean_semblance_after"] / hz["mean_semblance_before"])
    for where in ("survey", "high_scattering_zone"):
        s = m["summary"][where]
        assert s["mean_semblance_after"] > 2 * s["mean_semblance_before"]
    gather = m["shot_gather"]
    assert gather["scattering_fraction"] == pytest.approx(frac.max())


def test_pair_panels_are_per_shot_correlations_of_extreme_receivers(built):
    m, cfg = built["metrics"], built["config"]
    panels = m["pair_panels"]
    assert [p["group"] for p in panels] == ["low", "low", "high", "high"]
    frac = np.array(m["stations"]["receiver"]["scattering_fraction"])
    order = np.argsort(frac)
    assert [p["receiver_rows"][0] for p in panels] == [*order[:2].tolist(), *order[::-1][:2].tolist()]
    # one panel row, recomputed with scipy.signal.correlate as the reference correlation
    store = SurveyStore.open(built["store"])
    p = panels[2]
    swath, shot = p["swaths"][0], p["shots"][0]
    g = read_swath_geometry(store, swath)
    rows = [int(np.flatnonzero((g["shot"] == shot) & (g["receiver_index"] == r))[0]) for r in p["receiver_rows"]]
    a, v = cfg.analysis, np.asarray(cfg.analysis.velocity, float)
    dt = store.sample_interval_s
    taper = window_taper(store.n_samples, dt_s=dt, start_s=a.window_start_s, end_s=a.window_end_s, taper_s=a.taper_s)
    for side, array in (("before", "traces"), ("after", "corrected")):
        tr = store.array(swath, array)[:][rows]
        flat = nmo_correct(tr, offset_m=g["offset"][rows], delay_s=store.array(swath, "headers/delay_ms")[:][rows]
                           * 1e-3, dt_s=dt, velocity_t0_s=v[:, 0], velocity_vrms_mps=v[:, 1],
                           stretch_mute=a.stretch_mute)
        w = bandpass(flat, dt_s=dt, band_hz=a.band_hz, taper_hz=cfg.correction.band_taper_hz) * taper
        full = scipy.signal.correlate(w[0], w[1], mode="full") / np.sqrt(np.sum(w[0] ** 2) * np.sum(w[1] ** 2))
        max_lag = (len(p["lags_ms"]) - 1) // 2
        mid = store.n_samples - 1
        np.testing.assert_allclose(p[side][0], full[mid - max_lag: mid + max_lag + 1], atol=1e-9)
    # after correction the pair lines up at zero lag in every shot
    assert p["after_peak_lag_ms"] == 0.0 and p["after_peak"] > p["before_peak"]


def test_page_opens_with_the_caution_and_shows_the_spacing_warning(built):
    page = built["page"]
    body = page.split("<body>", 1)[1]
    assert body.lstrip().startswith("<div class='caution'>")
    assert "qualified geophysicist" in body[:400] and "licensed professional practice" in body[:400]
    a = built["config"].analysis
    # 12.5 m receiver spacing of the tiny survey, 180 m/s: aliased (common practice: 100-300 m/s near surface)
    warning = spacing_adequacy(12.5, velocity_mps=a.near_surface_velocity_mps, band_hz=tuple(a.band_hz))["warning"]
    assert warning and html.escape(warning) in page
    assert page.index(html.escape(warning)) < page.index("<h2>")  # prominent: before the first section
    assert built["metrics"]["spacing"]["receiver"]["aliased"] is True
    assert "S/N = (N S &minus; 1) / (N (1 &minus; S))" in page
    assert "every shot" in page


def test_sampled_report_reads_whole_shots_and_says_so(built, tmp_path, monkeypatch):
    import descatter.flows.report as report

    monkeypatch.setattr(report, "_figures", lambda *args: {})  # the figures are checked above; numbers here
    result = write_report(built["store"], tmp_path / "small", max_traces=500)
    m = json.loads((tmp_path / "small" / "metrics.json").read_text())
    s = m["sampling"]
    assert result["sampled"] and s["sampled"] and s["shots_total"] == 24
    assert s["traces_used"] <= 500 and s["traces_used"] == sum(m["shots"]["n_traces"]) == 96 * s["shots_used"]
    assert len(set(m["shots"]["swath"])) == 3  # spread over the survey
    assert f"Trace metrics use {s['shots_used']} of 24 shots" in (tmp_path / "small" / "index.html").read_text()


def test_missing_or_unfinished_corrected_traces_give_a_clear_error(built, tmp_path):
    store = tmp_path / "s.zarr"
    shutil.copytree(built["store"], store)
    shutil.rmtree(store / "checkpoints" / "apply" / "line03")
    with pytest.raises(InputNotFoundError, match=r"unfinished corrected traces in swath\(s\) line03"):
        write_report(store, tmp_path / "out")
    shutil.rmtree(store / "swaths" / "line02" / "corrected")
    with pytest.raises(InputNotFoundError) as err:
        write_report(store, tmp_path / "out")
    assert str(store) in str(err.value) and "line02" in str(err.value) and "run 'descatter apply" in str(err.value)
    assert not (tmp_path / "out").exists()


def test_batches_of_shots_give_the_same_numbers(built, monkeypatch):
    # CMP bins gather traces from several batches: their additive sums must merge exactly
    import descatter.flows.report as report

    store = SurveyStore.open(built["store"])
    cfg = built["config"]
    an = report.Analysis.of(cfg, dt_s=store.sample_interval_s, n_samples=store.n_samples)
    table = report._shot_table(store, cfg, set())
    binning = {k: tuple(built["metrics"]["cmp_bins"][k]) for k in ("bin_m", "origin")}
    monkeypatch.setattr(report, "BATCH_TRACES", 150)  # two shots of 96 traces per batch at most
    tm = report._trace_metrics(store, cfg, table, np.arange(len(table.shot)), an, binning)
    m = built["metrics"]
    np.testing.assert_allclose(tm["semblance_before"], m["shots"]["semblance_before"], rtol=1e-12)
    cmp = report._cmp_metrics(tm["cmp"], binning)
    np.testing.assert_allclose(cmp["semblance_after"], m["cmp_bins"]["semblance_after"], rtol=1e-12)
    np.testing.assert_allclose(tm["spectrum_after"], m["spectra"]["mean_amplitude_after"], rtol=1e-12)


def test_truth_comparison_matches_the_stored_clean_traces(built):
    m, cfg, result = built["metrics"], built["config"], built["result"]
    t = m["truth_comparison"]
    assert t["available"] and Path(t["file"]) == built["root"] / "survey" / "truth.npz"
    # truth.npz's own clean traces (tasks.synthetic.TRUTH_KEYS: swaths in order, recording order within each)
    clean = read_arrays(built["root"] / "survey" / "truth.npz")["clean"]
    store = SurveyStore.open(built["store"])
    assert store.swath_names() == ["line01", "line02", "line03"]
    a, v = cfg.analysis, np.asarray(cfg.analysis.velocity, float)
    dt = store.sample_interval_s
    start, stop = m["analysis"]["window_samples"]
    zone_of = {(sw, sh): z for sw, sh, z in zip(m["shots"]["swath"], m["shots"]["shot"], m["shots"]["high_scattering"])}
    corr = {"before": [], "after": []}
    zone, first = [], 0
    for name in store.swath_names():
        g = read_swath_geometry(store, name)
        n = len(g["shot"])
        live = ((read_qc_flags(store, name) & np.uint16(cfg.qc.exclude_bits())) == 0) & (g["source_index"] >= 0)
        truth = clean[first:first + n][live]
        first += n

        def flat(x):
            y = nmo_correct(x, offset_m=g["offset"][live], delay_s=np.zeros(int(live.sum())), dt_s=dt,
                            velocity_t0_s=v[:, 0], velocity_vrms_mps=v[:, 1], stretch_mute=a.stretch_mute)
            return bandpass(y, dt_s=dt, band_hz=a.band_hz, taper_hz=cfg.correction.band_taper_hz)[:, start:stop]

        b = flat(truth)
        for side, array in (("before", "traces"), ("after", "corrected")):
            x = flat(store.array(name, array)[:][live])
            corr[side].append(np.einsum("ij,ij->i", x, b) / np.sqrt(np.einsum("ij,ij->i", x, x)
                                                                      * np.einsum("ij,ij->i", b, b)))
        zone.append([zone_of[(name, int(s))] for s in g["shot"][live]])
    assert first == len(clean)
    zone = np.concatenate(zone)
    assert t["traces"] == len(zone) == m["sampling"]["traces_used"]
    for side in ("before", "after"):
        c = np.concatenate(corr[side])
        assert t["survey"][side]["median"] == pytest.approx(np.median(c), rel=1e-9)
        assert t["survey"][side]["q25"] == pytest.approx(np.quantile(c, 0.25), rel=1e-9)
        assert t["high_scattering_zone"][side]["median"] == pytest.approx(np.median(c[zone]), rel=1e-9)
        assert t["outside_zone"][side]["median"] == pytest.approx(np.median(c[~zone]), rel=1e-9)
        assert sum(t["survey"][side]["counts"]) == len(c)
    assert result["truth_median_correlation_after"] == t["survey"]["after"]["median"]
    assert t["survey"]["after"]["median"] > t["survey"]["before"]["median"] + 0.3  # the correction's gain
    page = built["page"]
    assert "<h2>Comparison with the synthetic truth</h2>" in page
    assert f"{t['survey']['after']['median']:.3g} after correction" in page
    assert "no time shift or scale fitted" in page and "without station filters and without noise" in page


def test_without_a_matching_truth_the_report_says_why(built, tmp_path, monkeypatch):
    import descatter.flows.report as report

    monkeypatch.setattr(report, "_figures", lambda *args: {})  # the figures are checked above; numbers here
    import descatter.storage.arrays_file as arrays_file

    monkeypatch.setattr(arrays_file, "TRUTH_FILE", "absent_truth.npz")
    result = write_report(built["store"], tmp_path / "none")
    t = json.loads((tmp_path / "none" / "metrics.json").read_text())["truth_comparison"]
    assert result["truth_median_correlation_after"] is None and t["available"] is False
    assert "no absent_truth.npz beside the swaths' SEG-Y files" in t["reason"]
    assert "No comparison with a synthetic truth" in (tmp_path / "none" / "index.html").read_text()

    monkeypatch.setattr(arrays_file, "TRUTH_FILE", "truth.npz")
    real = report.read_arrays

    def another_survey(path):
        arrays = real(path)
        arrays["receiver_x"] = arrays["receiver_x"] + 1.0  # every receiver 1 m off
        return arrays

    monkeypatch.setattr(report, "read_arrays", another_survey)
    write_report(built["store"], tmp_path / "other")
    t = json.loads((tmp_path / "other" / "metrics.json").read_text())["truth_comparison"]
    assert t["available"] is False
    assert "96 of 96 receiver stations have no truth station within 0.05 m" in t["reason"]
