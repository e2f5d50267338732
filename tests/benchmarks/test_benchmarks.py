"""Benchmarks, run at full size only on request (``pytest -m benchmark -s``).

The default suite runs each one at a tiny size and checks that it prints
its side-by-side ratios."""

from __future__ import annotations

import io
import sys
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).parent))
import bench_estimate  # noqa: E402
import bench_ingest  # noqa: E402
import bench_job  # noqa: E402
import bench_overhead  # noqa: E402
import bench_scaling  # noqa: E402
import bench_solve  # noqa: E402


def test_ingest_benchmark_prints_ratios_at_tiny_size():
    buf = io.StringIO()
    rows = bench_ingest.run(n_traces=2000, n_samples=200, workers=1, repeats=1, out=buf)
    text = buf.getvalue()
    assert "ingest/cp" in text and "ibm" in text and "ieee" in text
    for r in rows.values():
        assert r["ingest"] > 0 and r["cp"] > 0


@pytest.mark.benchmark
def test_ingest_benchmark_full_size():
    bench_ingest.run()


def test_solve_benchmark_prints_growth_at_tiny_size():
    buf = io.StringIO()
    rows = bench_solve.run(sizes=(200, 400), n_freq=4, out=buf)
    assert "growth exponent" in buf.getvalue()
    assert all(r["phase_err"] < 0.5 and r["amp_lu"] > 0 for r in rows.values())


@pytest.mark.benchmark
def test_solve_benchmark_full_size():
    bench_solve.run()


def test_solve_benchmark_patch_prints_direct_and_auto_at_tiny_size():
    buf = io.StringIO()
    rows = bench_solve.run_patch(sizes=(300, 700), n_freq=2, direct_timeout=60.0, out=buf)
    text = buf.getvalue()
    assert "growth exponent" in text and "auto (cg" in text
    # 300 stations stay below the dense threshold (direct), 700 go to CG; both agree with direct
    assert rows[300]["auto_method"] == "direct" and rows[700]["auto_method"] == "cg"
    assert all(not r["direct_stopped"] and r["diff"] < 1e-7 and r["truth_err"] < 1e-7 for r in rows.values())
    assert all(r["auto"] > 0 and r["direct_mb"] >= 0 for r in rows.values())


@pytest.mark.benchmark
def test_solve_benchmark_patch_full_size():
    bench_solve.run_patch()


def test_estimate_benchmark_prints_ratios_at_tiny_size():
    buf = io.StringIO()
    r = bench_estimate.run(n_traces=None, size="tiny", workers=1, calls=1, repeat=1, out=buf)
    text = buf.getvalue()
    assert "estimation / FFT floor" in text and "spectra_chunk" in text and "receiver_pairs_task" in text
    assert all(wall > 0 and cpu >= 0 for wall, cpu in r["rows"].values())
    # the chain computes the same FFTs as the floor and more (NMO, reads, writes, the sums)
    assert r["ratio"] > 1 and r["cpu_ratio"] > 1 and r["kernels"]["spectra"][0] > 0
    # one spectra task per chunk: the tiny survey's 3 swaths of 768 traces, chunks of 1000
    assert r["estimation"]["tasks"]["spectra"]["calls"] == 3
    assert r["traces"] == 2304 and r["n_fft"] >= r["window_samples"]


@pytest.mark.benchmark
def test_estimate_benchmark_full_size():
    bench_estimate.run()


def test_job_benchmark_outputs_agree_at_tiny_size():
    buf = io.StringIO()
    r = bench_job.run(n_traces=None, size="tiny", workers=1, profile=True, out=buf)
    text = buf.getvalue()
    assert "CPU ratio" in text and "outputs agree: yes" in text
    assert "pieces of apply_chunk" in text and "driver profile, estimate" in text
    a = r["agreement"]
    assert a["agree"] and a["traces"] == 2304 and a["compared"] > 2000
    assert a["min_corr"] >= bench_job.CORRELATION_TOLERANCE
    assert all(row["descatter"] > 0 and row["single"] > 0 for row in r["rows"].values())
    m = r["memory"]
    assert m["single_peak_rss_mb"] >= m["single_idle_mb"] > 0 and m["worker_peak_rss_mb"] > 0


@pytest.mark.benchmark
def test_job_benchmark_full_size():
    bench_job.run()


def test_scaling_benchmark_prints_growth_at_tiny_size():
    buf = io.StringIO()
    rows = bench_scaling.run(sizes=(600, 1200), workers=1, fresh_cluster=False, measure_synth=False, out=buf)
    text = buf.getvalue()
    assert "growth exponent" in text and "us/trace" in text and "disk MB" in text
    assert len(rows) == 2
    for r in rows.values():
        assert all(r["seconds"][k] > 0 and r["cpu"][k] > 0 for k in bench_scaling.STAGES)
        assert all(r["peaks"][k]["worker_mb"] > 0 for k in bench_scaling.STAGES)
        # the stored traces hold the samples: raw by default, smaller with compression_level > 0
        raw_mb = r["traces"] * r["synth"]["n_samples"] * 4 / 1e6
        assert 0.5 * raw_mb < r["disk"]["store_traces"] < 1.1 * raw_mb


@pytest.mark.benchmark
def test_scaling_benchmark_full_size():
    bench_scaling.run()


@pytest.mark.slow
def test_overhead_benchmark_prints_fractions_at_tiny_size():
    buf = io.StringIO()
    r = bench_overhead.run(n_traces=None, size="tiny", workers=1, out=buf)
    text = buf.getvalue()
    assert "no Prefect" in text and "fraction" in text
    first, rerun = r["runs"]["first run"], r["runs"]["rerun, all done"]
    assert 0 < first["fraction"] < 1 and first["summed"] > 0
    # a rerun skips every chunk: no chunk seconds, all of its wall is overhead
    assert rerun["summed"] == 0 and rerun["fraction"] == pytest.approx(1.0)
    assert rerun["wall"] < first["wall"]
    running = r["runs"]["on a running cluster"]
    assert 0 < running["fraction"] < 1 and running["summed"] > 0


@pytest.mark.benchmark
def test_overhead_benchmark_full_size():
    bench_overhead.run()


def test_incremental_benchmark_prints_its_ratio_at_tiny_size():
    import bench_incremental

    buf = io.StringIO()
    rows = bench_incremental.run(n_traces=2500, n_swaths=3, n_new=1, workers=1, out=buf)
    assert "incr/full" in buf.getvalue()
    # the added swath's job took less than the whole job, and gave its solution
    assert rows["same_solution"] and 0 < rows["incremental"]["ingest"] < rows["full"]["ingest"]


@pytest.mark.benchmark
def test_incremental_benchmark_full_size():
    import bench_incremental

    bench_incremental.run()
