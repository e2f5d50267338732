"""Benchmarks, run at full size only on request (``pytest -m benchmark -s``).

The default suite runs each one at a tiny size and checks that it prints
its side-by-side ratios."""

from __future__ import annotations

import io
import sys
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).parent))
import bench_ingest  # noqa: E402
import bench_solve  # noqa: E402


def test_ingest_benchmark_prints_ratios_at_tiny_size():
    buf = io.StringIO()
    rows = bench_ingest.run(n_traces=2000, n_samples=200, workers=1, out=buf)
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
