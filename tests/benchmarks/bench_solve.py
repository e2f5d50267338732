"""Solve time of the amplitude and phase solvers against the number of stations.

    python tests/benchmarks/bench_solve.py [--sizes 1000 10000 100000] [--freqs 40] [--repeat 1] [--no-cg]

Station graphs are synthetic and grid-like, built here with known truth:

- phase: stations on a square grid, each paired with its 8 neighbours (4
  edges per station), phases ``exp(-2 pi i f tau_j + i psi_j(f))``, cross
  sums with 0.2 rad of pair noise, weights in [0.3, 1];
- amplitude: receivers on a square grid (half the stations) and sources at
  random positions (the other half), each recording the receivers within
  1.5 grid steps (about 7 traces per source), offset bins of 0.25 steps.

Prints, side by side for every size, the solve time (set-up excluded) of
the amplitude solve (sparse LU; Jacobi-CG to a relative residual of 1e-8)
and of the phase solve (pinned connection Laplacian, one sparse LU per
frequency), their accuracy (amplitude: rms misfit of noise-free data;
phase: rms error against the planted phases, limited by the pair noise),
and the growth exponent: the log-log slope of time against stations over
the sizes. Other processes on the machine move the times; use --repeat.
"""

from __future__ import annotations

import argparse
import sys
import time

import numpy as np

from descatter.tasks.amplitude_solve import amplitude_solve
from descatter.tasks.phase_sync import phase_sync
from descatter.tasks.statistics import LogPowerSums


def phase_graph(n: int, n_freq: int, seed: int = 0):
    """pairs int64 [m, 2], cross complex128 [m, n_freq], weight [m, n_freq], true z [n, n_freq]."""
    rng = np.random.default_rng(seed)
    side = int(round(np.sqrt(n)))
    idx = np.arange(side * side).reshape(side, side)
    edges = [np.column_stack([idx[:, :-1].ravel(), idx[:, 1:].ravel()]),
             np.column_stack([idx[:-1, :].ravel(), idx[1:, :].ravel()]),
             np.column_stack([idx[:-1, :-1].ravel(), idx[1:, 1:].ravel()]),
             np.column_stack([idx[:-1, 1:].ravel(), idx[1:, :-1].ravel()])]
    pairs = np.sort(np.concatenate(edges), axis=1)
    pairs = pairs[np.lexsort((pairs[:, 1], pairs[:, 0]))]
    freqs = np.linspace(10.0, 65.0, n_freq)
    tau = 0.006 * rng.standard_normal(side * side)
    z = np.exp(-2j * np.pi * np.outer(tau, freqs) + 1j * rng.uniform(-1.0, 1.0, (side * side, n_freq)))
    noise = np.exp(0.2j * rng.standard_normal((len(pairs), n_freq)))
    cross = z[pairs[:, 0]] * np.conj(z[pairs[:, 1]]) * noise
    weight = rng.uniform(0.3, 1.0, (len(pairs), n_freq))
    return pairs, cross, weight, z


def amplitude_survey(n: int, n_freq: int, seed: int = 0):
    """LogPowerSums of noise-free log powers (an exact fit has zero residual)."""
    rng = np.random.default_rng(seed)
    side = int(round(np.sqrt(n / 2)))
    n_rcv = side * side
    n_src = n - n_rcv
    rx, ry = np.divmod(np.arange(n_rcv), side)
    sx, sy = rng.uniform(0, side - 1, n_src), rng.uniform(0, side - 1, n_src)
    src, rcv = [], []
    for dx in range(-2, 3):
        for dy in range(-2, 3):
            gx, gy = np.floor(sx).astype(int) + dx, np.floor(sy).astype(int) + dy
            ok = (gx >= 0) & (gx < side) & (gy >= 0) & (gy < side)
            ok &= np.hypot(gx - sx, gy - sy) <= 1.5
            src.append(np.flatnonzero(ok)), rcv.append((gx * side + gy)[ok])
    src, rcv = np.concatenate(src), np.concatenate(rcv)
    dist = np.hypot(rx[rcv] - sx[src], ry[rcv] - sy[src])
    off = np.minimum((dist / 0.25).astype(np.int64), 5)
    truth = {"source": rng.standard_normal((n_src, n_freq)), "receiver": rng.standard_normal((n_rcv, n_freq)),
             "offset": rng.standard_normal((6, n_freq))}
    index = {"source": src, "receiver": rcv, "offset": off}
    sizes = {"source": n_src, "receiver": n_rcv, "offset": 6}
    values = sum(truth[k][index[k]] for k in truth)
    sums = {k: np.stack([np.bincount(index[k], weights=values[:, f], minlength=sizes[k]) for f in range(n_freq)], 1)
            for k in truth}
    counts = {k: np.bincount(index[k], minlength=sizes[k]).astype(np.int64) for k in truth}
    cross = {}
    kinds = list(truth)
    for i, a in enumerate(kinds):
        for b in kinds[i + 1:]:
            key, count = np.unique(index[a] * sizes[b] + index[b], return_counts=True)
            cross[f"{a}|{b}"] = np.column_stack([key // sizes[b], key % sizes[b], count]).astype(np.int64)
    return LogPowerSums(sums, counts, cross, np.einsum("ij,ij->j", values, values), len(src))


def _timed(fn, repeat: int):
    best, result = np.inf, None
    for _ in range(repeat):
        t = time.perf_counter()
        result = fn()
        best = min(best, time.perf_counter() - t)
    return best, result


def _slope(sizes, times) -> float:
    return float(np.polyfit(np.log(sizes), np.log(times), 1)[0])


def run(sizes=(1_000, 10_000, 100_000), n_freq: int = 40, repeat: int = 1, cg_tol: float = 1e-8,
        cg: bool = True, out=sys.stdout) -> dict:
    rows = {}
    for n in sizes:
        sums = amplitude_survey(n, n_freq)
        t_lu, sol = _timed(lambda: amplitude_solve(sums, method="direct"), repeat)
        t_cg, sol_cg = _timed(lambda: amplitude_solve(sums, method="cg", tol=cg_tol, maxiter=20_000), repeat) \
            if cg else (np.nan, sol)
        pairs, cross, weight, z = phase_graph(n, n_freq)
        t_ph, ph = _timed(lambda: phase_sync(pairs, cross, weight, n_stations=len(z)), repeat)
        g = z * np.conj(z.sum(axis=0) / np.abs(z.sum(axis=0)))
        e_ph = float(np.sqrt(np.mean(np.angle(ph.z * np.conj(g)) ** 2)))
        rows[n] = dict(amp_lu=t_lu, amp_cg=t_cg, cg_iter=sol_cg.iterations, phase=t_ph,
                       amp_rms=float(sol.residual_rms.max()), amp_cg_rms=float(sol_cg.residual_rms.max()),
                       phase_err=e_ph, pairs=len(pairs), traces=sums.n_traces)
        print(f"n={n:>7}: amplitude LU {t_lu:8.3f} s (fit rms {rows[n]['amp_rms']:.0e}) | amplitude CG {t_cg:8.3f} s "
              f"({sol_cg.iterations} it, fit rms {rows[n]['amp_cg_rms']:.0e}) | phase LU x{n_freq} {t_ph:8.3f} s "
              f"(rms phase err {e_ph:.3f} rad) | {sums.n_traces} traces, {len(pairs)} pairs", file=out, flush=True)
    if len(sizes) > 1:
        ns = list(rows)
        print(f"growth exponent (log-log slope of time vs stations, {ns[0]}..{ns[-1]}): "
              f"amplitude LU {_slope(ns, [rows[n]['amp_lu'] for n in ns]):.2f}, "
              f"amplitude CG {_slope(ns, [rows[n]['amp_cg'] for n in ns]):.2f}, "
              f"phase LU {_slope(ns, [rows[n]['phase'] for n in ns]):.2f}", file=out, flush=True)
    return rows


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", type=int, nargs="+", default=[1_000, 10_000, 100_000])
    parser.add_argument("--freqs", type=int, default=40)
    parser.add_argument("--repeat", type=int, default=1)
    parser.add_argument("--cg-tol", type=float, default=1e-8)
    parser.add_argument("--no-cg", action="store_true", help="skip the Jacobi-CG amplitude solve (the slowest)")
    args = parser.parse_args(argv)
    run(tuple(args.sizes), args.freqs, args.repeat, args.cg_tol, not args.no_cg)


if __name__ == "__main__":
    main()
