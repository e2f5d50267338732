"""Estimation end to end on synthetic surveys with known truth.

The targets are those the method must reach (surface-consistent statics
to 0.25 ms rms; log-amplitudes correlated >= 0.98; relative filters of
neighbouring receivers correlated >= 0.9; scattering fraction ranked like
the truth, Spearman >= 0.7). Spearman rank correlation from scipy.stats.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from scipy.stats import spearmanr

from descatter.flows.ingest import ingest_swaths
from descatter.flows.solve import estimate_survey, load_totals
from descatter.flows.stations_table import STATION_COLUMNS, write_filters, write_station_table
from descatter.storage.arrays_file import read_arrays
from descatter.storage.config_file import load_config
from descatter.storage.estimation import read_solution
from descatter.storage.runlog import read_runlog
from descatter.storage.store import SurveyStore
from descatter.storage.tables import read_csv
from descatter.tasks.synthetic import station_response, station_truth, synthetic_spec


def _survey(tmp_path_factory, scenario: str, seed: int) -> Path:
    from descatter.flows.synth import write_synthetic_survey

    out = tmp_path_factory.mktemp(f"{scenario}_survey")
    write_synthetic_survey(out, scenario=scenario, size="tiny", seed=seed)
    return out


def _estimated(survey: Path, store: Path, client) -> dict:
    cfg = load_config(survey / "survey.toml")
    ingest_swaths(store, sorted(survey.glob("line*.sgy")), cfg, client=client)
    return estimate_survey(store, cfg, client=client)


def _join(store: Path, truth: dict, kind: str, tmp: Path) -> tuple[dict, np.ndarray]:
    """Station rows of one kind, and for each the index of the true station
    at the same coordinates (the CSV is documented to join on x, y)."""
    write_station_table(store, tmp / "stations.csv")
    header, rows = read_csv(tmp / "stations.csv")
    assert tuple(header) == STATION_COLUMNS
    rows = [r for r in rows if r[0] == kind]
    cols = {c: np.array([r[i] for r in rows]) for i, c in enumerate(header)}
    x, y = cols["x"].astype(float), cols["y"].astype(float)
    tx, ty = truth[f"{kind}_x"], truth[f"{kind}_y"]
    d = np.hypot(x[:, None] - tx[None, :], y[:, None] - ty[None, :])
    match = d.argmin(axis=1)
    assert d.min(axis=1).max() < 0.05
    return cols, match


@pytest.fixture(scope="module")
def statics(tmp_path_factory, client):
    survey = _survey(tmp_path_factory, "statics", seed=11)
    store = tmp_path_factory.mktemp("statics_store") / "s.zarr"
    result = _estimated(survey, store, client)
    return survey, store, result


@pytest.fixture(scope="module")
def scatter(tmp_path_factory, client):
    survey = _survey(tmp_path_factory, "scatter", seed=12)
    store = tmp_path_factory.mktemp("scatter_store") / "s.zarr"
    result = _estimated(survey, store, client)
    return survey, store, result


@pytest.mark.parametrize("kind", ["source", "receiver"])
def test_statics_and_amplitudes_recovered(statics, kind, tmp_path):
    survey, store, _ = statics
    truth = read_arrays(survey / "truth.npz")
    cols, match = _join(store, truth, kind, tmp_path)
    est = cols["static_ms"].astype(float)
    true = truth[f"{kind}_static_s"][match] * 1e3
    ok = cols["identity"] == "false"
    assert ok.mean() > 0.9
    err = (est - est[ok].mean()) - (true - true[ok].mean())
    rms = float(np.sqrt(np.mean(err[ok] ** 2)))
    print(f"{kind} statics rms error {rms:.3f} ms (truth rms {true.std():.2f} ms)")
    assert rms <= 0.25
    amp = cols["amplitude_db"].astype(float)
    r = np.corrcoef(amp[ok], truth[f"{kind}_log_amplitude"][match][ok])[0, 1]
    print(f"{kind} log-amplitude correlation {r:.4f}")
    assert r >= 0.98


def _relative_filter_quality(survey: Path, store: Path, tmp_path: Path) -> tuple[float, float]:
    """Median correlation of estimated and true R_j conj(R_k) over the
    receiver pairs, and the Spearman rank correlation of the receivers'
    scattering fractions with the truth."""
    from descatter.storage.stations import read_stations

    truth = read_arrays(survey / "truth.npz")
    cols, match = _join(store, truth, "receiver", tmp_path)
    sid, arrays, attrs = read_solution(SurveyStore.open(store))
    freqs = arrays["freq_hz"]
    spec = synthetic_spec(size="tiny", scenario="scatter", seed=12)
    true_resp = station_response(station_truth(spec), "receiver", freqs)
    table = read_stations(SurveyStore.open(store), "receivers")
    d = np.hypot(table["x"][:, None] - truth["receiver_x"][None], table["y"][:, None] - truth["receiver_y"][None])
    t_of = d.argmin(axis=1)
    est = arrays["receiver_response"].astype(np.complex128)
    pairs = load_totals(SurveyStore.open(store)).receiver_pairs.pairs
    a = est[pairs[:, 0]] * np.conj(est[pairs[:, 1]])
    b = true_resp[t_of[pairs[:, 0]]] * np.conj(true_resp[t_of[pairs[:, 1]]])
    corr = np.real(np.sum(a * np.conj(b), axis=1)) / (np.linalg.norm(a, axis=1) * np.linalg.norm(b, axis=1))
    ok = cols["identity"] == "false"
    rho = spearmanr(cols["scattering_fraction"].astype(float)[ok],
                    truth["receiver_scattering_fraction"][match][ok]).statistic
    print(f"relative filter correlation: median {np.median(corr):.3f} over {len(corr)} receiver pairs; "
          f"receiver scattering fraction Spearman {rho:.3f}")
    return float(np.median(corr)), float(rho)


def test_relative_filters_and_scattering_rank_do_not_regress(scatter, tmp_path):
    # Measured on this tiny survey (24 shots, noise 0.5): 0.881 and 0.670 (with
    # pair sums smoothed over 2 Hz, amplitudes from the pair magnitudes and the
    # smooth phase gauge; 0.767 and 0.480 before them). On the demo survey (100
    # shots) 0.936 and 0.731. The ceiling here: the true responses in the
    # 10-65 Hz band rank at 0.71, and noise-free traces reach a median of 0.94.
    # The floors guard against regressions while the method improves.
    median_corr, rho = _relative_filter_quality(scatter[0], scatter[1], tmp_path)
    assert median_corr >= 0.85
    assert rho >= 0.6


@pytest.mark.xfail(strict=True, reason="method targets not reached yet on the tiny survey "
                                       "(measured 0.881 and 0.670); XPASS means update the floor above")
def test_relative_filters_and_scattering_rank_reach_targets(scatter, tmp_path):
    median_corr, rho = _relative_filter_quality(scatter[0], scatter[1], tmp_path)
    assert median_corr >= 0.9 and rho >= 0.7


def test_solution_outputs(scatter, tmp_path):
    survey, store, result = scatter
    sid, n = write_filters(store, tmp_path / "filters.npz")
    f = read_arrays(tmp_path / "filters.npz")
    assert set(f) == {"kind", "station", "x", "y", "freq_hz", "response", "filter", "dt_s"}
    assert f["response"].shape == (n, len(f["freq_hz"]))
    assert np.isfinite(f["response"]).all() and np.isfinite(f["filter"]).all()
    assert list(f["kind"][:24]) == ["source"] * 24  # sources first (tiny survey: 24 source stations)
    assert result["summary"]["receiver_components"] == 1


def test_solve_on_the_workers_equals_the_solve_in_process(scatter, client):
    """The task graph of the solve (pair totals, amplitude solve, frequency
    blocks of phases, per-kind filters) gives the in-process answer, and
    logs the seconds of each of its tasks."""
    from descatter.flows.estimate import spectra_params
    from descatter.flows.solve import solve_stations

    survey, store, result = scatter
    cfg = load_config(survey / "survey.toml")
    st = SurveyStore.open(store)
    _, sol, _ = read_solution(st, result["solution"], names=("freq_hz",))
    n_fft = spectra_params(cfg, dt_s=st.sample_interval_s)["n_fft"]

    class Log:
        def __init__(self):
            self.rows = []

        def write(self, stage, event, **fields):
            self.rows.append((stage, event, fields))

    log = Log()
    here, summary_here = solve_stations(st, cfg, sol["freq_hz"], n_fft, client=None)
    there, summary_there = solve_stations(st, cfg, sol["freq_hz"], n_fft, client=client, runlog=log)
    assert here.keys() == there.keys()
    for k in here:
        # phase blocks of 8 frequencies against one call over all: the same LU per frequency
        assert np.allclose(here[k], there[k], rtol=1e-7, atol=1e-7), k
    assert summary_here["receiver_components"] == summary_there["receiver_components"]
    parts = {f["part"] for stage, event, f in log.rows if stage == "solve" and event == "batch"}
    assert {"log_power", "amplitude", "receiver_pairs", "source_pairs", "receiver_phase", "receiver_filters"} <= parts
    assert all(f["seconds"] > 0 for _, _, f in log.rows)


def test_rerun_skips_finished_work_and_statistics_add_up(scatter, client, tmp_path):
    survey, store, _ = scatter
    cfg = load_config(survey / "survey.toml")
    again = estimate_survey(store, cfg, client=client)
    assert again["spectra_resumed"] == sum(len(r.chunk_bounds()) for r in SurveyStore.open(store).manifest())
    assert set(again["stats_skipped"]) >= {"line01", "line02", "line03"}
    # swaths one at a time: the same statistics as all at once
    one = tmp_path / "one.zarr"
    for line in sorted(survey.glob("line*.sgy")):
        ingest_swaths(one, [line], cfg, client=client)
        estimate_survey(one, cfg, client=client)
    a, b = load_totals(SurveyStore.open(store)), load_totals(SurveyStore.open(one))
    for name in ("receiver_pairs", "source_pairs"):
        pa, pb = getattr(a, name), getattr(b, name)
        assert np.array_equal(pa.pairs, pb.pairs) and np.array_equal(pa.cross, pb.cross)
    assert np.array_equal(a.log_power.sum_sq, b.log_power.sum_sq)
    _, sa, _ = read_solution(SurveyStore.open(store))
    _, sb, _ = read_solution(SurveyStore.open(one))
    assert np.allclose(sa["receiver_static_ms"], sb["receiver_static_ms"], atol=1e-9)
    skipped = [r for r in read_runlog(one) if r["stage"] == "spectra" and r["event"] == "batch" and r["resumed"]]
    assert skipped  # earlier swaths' spectra were not recomputed


def test_apply_corrects_passes_dead_traces_and_exports(scatter, client, tmp_path):
    import shutil

    import segyio

    from descatter.flows.apply import apply_solution
    from descatter.flows.export import export_segy
    from descatter.storage.stations import write_qc_flags, read_qc_flags
    from descatter.tasks.trace_qc import FLAG_BITS

    survey, store_src, _ = scatter
    store = tmp_path / "s.zarr"
    shutil.copytree(store_src, store)
    cfg = load_config(survey / "survey.toml")
    s = SurveyStore.open(store, writable=True)
    flags = read_qc_flags(s, "line01")
    flags[7] |= FLAG_BITS["excluded"]  # an excluded trace must pass through untouched
    write_qc_flags(s, "line01", flags)
    result = apply_solution(store, cfg, client=client)
    assert result["passed_through"] == 1
    raw, cor = s.array("line01", "traces")[:], s.array("line01", "corrected")[:]
    assert np.array_equal(cor[7], raw[7])
    assert np.isfinite(cor).all() and not np.array_equal(cor[8], raw[8])
    again = apply_solution(store, cfg, client=client)
    assert again["resumed_chunks"] == sum(len(r.chunk_bounds()) for r in s.manifest())
    # exported corrected SEG-Y read back with segyio equals the store; headers equal the input's
    export_segy(store, tmp_path / "corrected.sgy", array="corrected")
    with segyio.open(str(tmp_path / "corrected.sgy"), ignore_geometry=True) as f, \
            segyio.open(str(sorted(survey.glob("line*.sgy"))[0]), ignore_geometry=True) as g:
        f.mmap()
        assert np.array_equal(f.trace.raw[: len(cor)], cor)
        assert all(dict(f.header[i]) == dict(g.header[i]) for i in (0, 7, len(cor) - 1))
    assert s.array("line01", "corrected").attrs["mode"] == "full"


def test_apply_shapes_to_a_target_band(scatter, client, tmp_path):
    import shutil

    from descatter.flows.apply import apply_solution
    from descatter.tasks.wavelets import band_taper

    survey, store_src, _ = scatter
    plain, shaped = tmp_path / "plain.zarr", tmp_path / "shaped.zarr"
    shutil.copytree(store_src, plain)
    shutil.copytree(store_src, shaped)
    cfg = load_config(survey / "survey.toml")
    apply_solution(plain, cfg, client=client)
    corners = (10.0, 15.0, 30.0, 40.0)
    cfg.correction.shaping_hz = corners
    settings = apply_solution(shaped, cfg, client=client)["settings"]
    a = SurveyStore.open(plain).array("line01", "corrected")[:64].astype(np.float64)
    b = SurveyStore.open(shaped).array("line01", "corrected")[:64].astype(np.float64)
    # shaping multiplies the correction by the trapezoid T(f) on the correction's FFT grid: the shaped
    # traces are the plain ones filtered by T (numpy.fft as the reference convolution)
    n_fft = settings["n_fft"]
    t = band_taper(np.fft.rfftfreq(n_fft, SurveyStore.open(plain).sample_interval_s), corners_hz=corners)
    want = np.fft.irfft(np.fft.rfft(a, n_fft) * t, n_fft)[:, : a.shape[1]]
    live = np.abs(a).max(axis=1) > 0
    err = np.linalg.norm(b - want, axis=1)[live] / np.linalg.norm(want, axis=1)[live]
    assert np.median(err) < 0.05
    f = np.fft.rfftfreq(a.shape[1], SurveyStore.open(plain).sample_interval_s)
    power = np.abs(np.fft.rfft(b, axis=1)) ** 2
    assert power[:, f > 50].sum() < 1e-3 * power.sum()  # nothing left above f4


@pytest.mark.slow
def test_demo_survey_reaches_the_method_targets(client, tmp_path_factory, tmp_path):
    """On the demo-size scattering survey (100 shots, seed 7): relative filters
    >= 0.9 median correlation and receiver scattering-fraction Spearman >= 0.7
    (measured 0.936 and 0.732); after correction, mean semblance of
    NMO-corrected shot gathers at least doubles in the high-scattering zone
    (measured 0.110 -> 0.634 with the default measured prewhitening, the
    per-frequency noise-to-signal ratio from the pair coherence; 0.544 with
    the fixed fraction 0.1); the corrected traces' median zero-lag
    correlation with the clean truth (the report's truth comparison) reaches
    0.85.

    That last target is not reached (measured 0.696, 0.629 with the fixed
    fraction 0.1; 0.118 before). Its ceiling at this noise level: the same
    correction with the true station filters gives 0.813 with the measured
    prewhitening (0.809 with the fixed 0.1) and 0.847 with the per-frequency
    Wiener prewhitening of the exact noise and signal spectra (0.848 with
    each trace's exact noise level), so no prewhitening reaches 0.85 here.
    The floor guards against regressions (0.65: above what the fixed
    fraction gives); the target is reported as an expected failure."""
    from descatter.flows.apply import apply_solution
    from descatter.flows.report import write_report
    from descatter.flows.synth import write_synthetic_survey

    survey = tmp_path_factory.mktemp("demo_scatter")
    write_synthetic_survey(survey, scenario="scatter", size="demo", seed=7)
    store = tmp_path_factory.mktemp("demo_store") / "s.zarr"
    _estimated(survey, store, client)
    truth = read_arrays(survey / "truth.npz")
    spec = synthetic_spec(size="demo", scenario="scatter", seed=7)
    sid, arrays, _ = read_solution(SurveyStore.open(store))
    from descatter.storage.stations import read_stations

    table = read_stations(SurveyStore.open(store), "receivers")
    t_of = np.hypot(table["x"][:, None] - truth["receiver_x"][None],
                    table["y"][:, None] - truth["receiver_y"][None]).argmin(axis=1)
    true_resp = station_response(station_truth(spec), "receiver", arrays["freq_hz"])[t_of]
    est = arrays["receiver_response"].astype(np.complex128)
    pairs = load_totals(SurveyStore.open(store)).receiver_pairs.pairs
    a = est[pairs[:, 0]] * np.conj(est[pairs[:, 1]])
    b = true_resp[pairs[:, 0]] * np.conj(true_resp[pairs[:, 1]])
    corr = np.real(np.sum(a * np.conj(b), axis=1)) / (np.linalg.norm(a, axis=1) * np.linalg.norm(b, axis=1))
    ok = ~arrays["receiver_identity"]
    rho = spearmanr(arrays["receiver_scattering_fraction"][ok], truth["receiver_scattering_fraction"][t_of][ok]).statistic
    print(f"demo: relative filter median {np.median(corr):.3f}, receiver Spearman {rho:.3f}")
    assert np.median(corr) >= 0.9 and rho >= 0.7
    applied = apply_solution(store, load_config(survey / "survey.toml"), client=client)
    assert applied["settings"]["prewhitening_mode"] == "measured"  # the solve measured the noise level
    rep = write_report(store, tmp_path / "report")
    print(f"demo: high-zone semblance {rep['high_zone_semblance_before']:.3f} -> {rep['high_zone_semblance_after']:.3f}")
    assert rep["high_zone_semblance_after"] >= 2 * rep["high_zone_semblance_before"]
    before, after = rep["truth_median_correlation_before"], rep["truth_median_correlation_after"]
    print(f"demo: median zero-lag correlation with the clean truth {before:.3f} -> {after:.3f}")
    assert after >= 0.65
    if after < 0.85:
        pytest.xfail(f"median correlation with the truth {after:.3f} < 0.85: out of reach at this noise level "
                     "even with the true filters (0.847); see the docstring")
