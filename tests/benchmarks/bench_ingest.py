"""Ingest throughput against cat, cp and a segyio full read, side by side.

    python tests/benchmarks/bench_ingest.py [--traces 50000] [--samples 1500] [--workers 2]

Writes one IEEE and one IBM file of the same traces in a temporary folder on
the same file system, warms the page cache with one read, then times, on
the same file: ``cat`` to /dev/null, ``cp`` to a new file (no fsync), a
segyio read of every trace with mmap, and ``descatter ingest`` into a new
store (worker start-up excluded: the cluster is started first and its
workers have ingested a small file once). Each figure is the best of
``--repeats`` runs, the usual estimate least disturbed by other load (the
first write into fresh memory is slow on virtual machines). Prints MB/s and
ratios to cp.
"""

from __future__ import annotations

import argparse
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np


def _make_file(path: Path, n_traces: int, n_samples: int, sample_format: str) -> None:
    from descatter.storage.segy_write import (
        SegyWriter, build_binary_header, build_textual_header, build_trace_headers,
    )
    from descatter.tasks.config import HeaderPositions

    layout = HeaderPositions().layout()
    rng = np.random.default_rng(0)
    code = 5 if sample_format == "ieee" else 1
    binary = build_binary_header(sample_interval_us=2000, n_samples=n_samples, format_code=code)
    with SegyWriter(path, textual=build_textual_header(["BENCHMARK FILE"]), binary=binary,
                    n_samples=n_samples, sample_format=sample_format) as w:
        for a in range(0, n_traces, 5000):
            n = min(5000, n_traces - a)
            # band-limited noise (a running sum of white noise, detrended), like seismic for a codec
            x = np.cumsum(rng.standard_normal((n, n_samples), dtype=np.float32), axis=1)
            x -= x.mean(axis=1, keepdims=True)
            idx = np.arange(a, a + n)
            fields = {"field_record": idx // 500 + 1, "channel": idx % 500 + 1,
                      "n_samples": np.full(n, n_samples), "interval_us": np.full(n, 2000),
                      "coordinate_scalar": np.full(n, 1), "receiver_x": idx % 500 * 10,
                      "source_x": idx // 500 * 10, "coordinate_units": np.ones(n, int)}
            w.write(build_trace_headers(fields, layout, n), x.astype(np.float32))


def _timed(fn, repeats: int = 1) -> float:
    """Best wall time of ``repeats`` calls of ``fn``."""
    best = float("inf")
    for _ in range(repeats):
        t = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t)
    return best


def run(n_traces: int = 50_000, n_samples: int = 1500, workers: int = 2, repeats: int = 3,
        out=sys.stdout) -> dict:
    import segyio

    from descatter.flows.cluster import dask_client
    from descatter.flows.ingest import ingest_swaths
    from descatter.tasks.config import SurveyConfig

    rows = {}
    with tempfile.TemporaryDirectory(dir=Path.cwd()) as tmp, dask_client("local", workers=workers) as client:
        tmp = Path(tmp)
        warm = tmp / "warm.sgy"
        _make_file(warm, min(n_traces, 2000), n_samples, "ieee")
        ingest_swaths(tmp / "warm.zarr", [warm], SurveyConfig(), client=client)  # imports on the workers
        for fmt in ("ieee", "ibm"):
            src = tmp / f"bench_{fmt}.sgy"
            _make_file(src, n_traces, n_samples, fmt)
            mb = src.stat().st_size / 1e6
            subprocess.run(["cat", str(src)], stdout=subprocess.DEVNULL, check=True)  # warm the cache
            t_cat = _timed(lambda: subprocess.run(["cat", str(src)], stdout=subprocess.DEVNULL, check=True), repeats)
            dst = tmp / "copy.sgy"

            def copy():
                dst.unlink(missing_ok=True)
                subprocess.run(["cp", str(src), str(dst)], check=True)

            t_cp = _timed(copy, repeats)
            dst.unlink()

            def segyio_read():
                with segyio.open(str(src), ignore_geometry=True) as f:
                    f.mmap()
                    f.trace.raw[:]

            t_segyio = _timed(segyio_read, repeats)
            store = tmp / f"{fmt}.zarr"

            def ingest():
                shutil.rmtree(store, ignore_errors=True)
                ingest_swaths(store, [src], SurveyConfig(), client=client)

            t_ingest = _timed(ingest, repeats)
            shutil.rmtree(store)
            rows[fmt] = {"MB": mb, "cat": mb / t_cat, "cp": mb / t_cp, "segyio": mb / t_segyio,
                         "ingest": mb / t_ingest}
    print(f"ingest benchmark: {n_traces} traces x {n_samples} samples, {workers} worker(s), "
          f"best of {repeats}", file=out)
    print(f"{'format':<7}{'MB':>9}{'cat MB/s':>11}{'cp MB/s':>10}{'segyio MB/s':>13}{'ingest MB/s':>13}"
          f"{'ingest/cp':>11}{'ingest/cat':>12}", file=out)
    for fmt, r in rows.items():
        print(f"{fmt:<7}{r['MB']:>9.1f}{r['cat']:>11.0f}{r['cp']:>10.0f}{r['segyio']:>13.0f}"
              f"{r['ingest']:>13.0f}{r['ingest'] / r['cp']:>11.2f}{r['ingest'] / r['cat']:>12.2f}", file=out)
    return rows


if __name__ == "__main__":
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--traces", type=int, default=50_000)
    ap.add_argument("--samples", type=int, default=1500)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args()
    run(args.traces, args.samples, args.workers, args.repeats)
