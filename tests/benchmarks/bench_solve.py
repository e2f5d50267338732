"""Solve time of the amplitude and phase solvers against the number of stations.

    python tests/benchmarks/bench_solve.py [--geometry both|grid|patch] [--sizes 1000 10000 100000]
        [--freqs 40] [--repeat 1] [--no-cg] [--patch-sizes 500 1000 2000 4000 8000] [--patch-freqs 16]
        [--direct-timeout 10]

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

Densely coupled ("patch", :func:`run_patch`): receivers on a square grid
(half the stations), sources at random positions (the other half), every
shot recording all receivers within 24 grid steps, like a 3D patch (all
receivers at 500 stations, about half at 8000), offset bins of 2 steps.
Nearly every unknown couples to more than ``max(100, 4 sqrt(n))`` others,
the direct solve's "dense" block. Each solve runs in a forked process that
reports its time and peak resident memory (the rise of VmHWM over the
process's resident size at the start, C allocations of SuperLU and LAPACK
included); a direct solve that outlasts --direct-timeout is stopped and
shown as ">". Prints, per size, direct against the default
``method="auto"`` (which method it took, CG iterations), the largest
difference of their terms, the error of auto against the planted terms
(noise-free data, gauge applied to the truth), and the growth exponents
of time and memory.
"""

from __future__ import annotations

import argparse
import multiprocessing
import sys
import time
import tracemalloc
import warnings

import numpy as np
import scipy.sparse as sp

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


def patch_survey(n: int, n_freq: int, radius: float = 24.0, bin_width: float = 2.0, seed: int = 0):
    """LogPowerSums of noise-free log powers on a densely coupled 3D patch, and the planted
    terms {kind: [n_kind, n_freq]}. The sums come from the cross-count tables
    (``sums_a = count_a t_a + sum_b C_ab t_b``, ``sum L^2 = t.N t``), so no trace-by-frequency
    array is formed: millions of traces cost seconds."""
    rng = np.random.default_rng(seed)
    side = int(round(np.sqrt(n / 2)))
    n_rcv = side * side
    n_src = n - n_rcv
    rx, ry = np.divmod(np.arange(n_rcv), side)
    sx, sy = rng.uniform(0, side - 1, n_src), rng.uniform(0, side - 1, n_src)
    src, rcv, dist = [], [], []
    for lo in range(0, n_src, 256):
        d = np.hypot(sx[lo: lo + 256, None] - rx[None], sy[lo: lo + 256, None] - ry[None])
        i, j = np.nonzero(d <= radius)
        src.append(lo + i), rcv.append(j), dist.append(d[i, j])
    src, rcv, dist = np.concatenate(src), np.concatenate(rcv), np.concatenate(dist)
    off = (dist / bin_width).astype(np.int64)
    index = {"source": src, "receiver": rcv, "offset": off}
    sizes = {"source": n_src, "receiver": n_rcv, "offset": int(off.max()) + 1}
    truth = {k: rng.standard_normal((sizes[k], n_freq)) for k in sizes}
    counts = {k: np.bincount(index[k], minlength=sizes[k]).astype(np.int64) for k in sizes}
    sums = {k: counts[k][:, None] * truth[k] for k in sizes}
    cross = {}
    kinds = list(sizes)
    for i, a in enumerate(kinds):
        for b in kinds[i + 1:]:
            key, count = np.unique(index[a] * sizes[b] + index[b], return_counts=True)
            table = np.column_stack([key // sizes[b], key % sizes[b], count]).astype(np.int64)
            cross[f"{a}|{b}"] = table
            c = sp.csr_matrix((count.astype(np.float64), (table[:, 0], table[:, 1])), shape=(sizes[a], sizes[b]))
            sums[a] = sums[a] + c @ truth[b]
            sums[b] = sums[b] + c.T @ truth[a]
    sum_sq = sum(np.einsum("ij,ij->j", truth[k], sums[k]) for k in kinds)
    return LogPowerSums(sums, counts, cross, sum_sq, len(src)), truth


def _gauged_truth(truth: dict) -> np.ndarray:
    """The planted terms in the amplitude solve's gauge for one connected survey: mean source and
    receiver terms zero, their levels in the offset term; stacked source, receiver, offset."""
    ms, mr = truth["source"].mean(axis=0), truth["receiver"].mean(axis=0)
    return np.concatenate([truth["source"] - ms, truth["receiver"] - mr, truth["offset"] + ms + mr])


def _status_mb(field: str, pid: str = "self") -> float:
    with open(f"/proc/{pid}/status") as f:
        for line in f:
            if line.startswith(field + ":"):
                return int(line.split()[1]) / 1024.0
    raise KeyError(field)


def _can_fork_and_measure() -> bool:
    if "fork" not in multiprocessing.get_all_start_methods():
        return False
    try:
        with open("/proc/self/clear_refs", "w") as f:
            f.write("5")  # Linux: reset the peak resident size (VmHWM) to the current one
        _status_mb("VmHWM")
        return True
    except OSError:
        return False


def _child(conn, fn) -> None:
    with open("/proc/self/clear_refs", "w") as f:
        f.write("5")
    base = _status_mb("VmRSS")
    conn.send(base)
    t = time.perf_counter()
    try:
        sol = fn()
    except Exception as exc:  # noqa: BLE001 - reported by the parent
        conn.send(exc)
        return
    seconds = time.perf_counter() - t
    conn.send(dict(seconds=seconds, peak_mb=_status_mb("VmHWM") - base, method=sol.method,
                   iterations=sol.iterations, converged=bool(sol.converged.all()),
                   terms=np.concatenate([sol.term(k) for k in sol.terms])))
    conn.close()


def _measured(fn, timeout: float | None) -> dict:
    """Time, peak memory and result summary of fn() in a forked process, stopped after timeout
    seconds (None: no limit; stopped=True, the peak so far); in-process with tracemalloc (NumPy allocations only)
    where fork or VmHWM are missing."""
    if not _can_fork_and_measure():
        tracemalloc.start()
        t = time.perf_counter()
        sol = fn()
        seconds = time.perf_counter() - t
        peak = tracemalloc.get_traced_memory()[1] / 2**20
        tracemalloc.stop()
        return dict(seconds=seconds, peak_mb=peak, method=sol.method, iterations=sol.iterations, stopped=False,
                    converged=bool(sol.converged.all()), terms=np.concatenate([sol.term(k) for k in sol.terms]))
    ctx = multiprocessing.get_context("fork")
    parent, child = ctx.Pipe(duplex=False)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DeprecationWarning)  # fork with BLAS threads idle
        proc = ctx.Process(target=_child, args=(child, fn), daemon=True)
        proc.start()
    child.close()
    try:
        base = parent.recv()
        if parent.poll(timeout):
            out = parent.recv()
            if isinstance(out, Exception):
                raise out
            out["stopped"] = False
            proc.join()
            return out
        peak = _status_mb("VmHWM", str(proc.pid)) - base
        return dict(seconds=timeout, peak_mb=peak, method="direct", iterations=0, converged=False, terms=None,
                    stopped=True)
    finally:
        if proc.is_alive():
            proc.kill()
        proc.join()
        parent.close()


def run_patch(sizes=(500, 1_000, 2_000, 4_000, 8_000), n_freq: int = 16, direct_timeout: float = 10.0,
              out=sys.stdout) -> dict:
    """Direct against method="auto" on densely coupled patches (module notes); rows per size."""
    rows = {}
    for n in sizes:
        t = time.perf_counter()
        sums, truth = patch_survey(n, n_freq)
        build = time.perf_counter() - t
        n_unknown = sum(len(v) for v in sums.counts.values())
        d = _measured(lambda: amplitude_solve(sums, method="direct"), direct_timeout)
        a = _measured(lambda: amplitude_solve(sums), None)
        diff = float(np.abs(a["terms"] - d["terms"]).max()) if d["terms"] is not None else np.nan
        err = float(np.abs(a["terms"] - _gauged_truth(truth)).max())
        rows[n] = dict(direct=d["seconds"], direct_mb=d["peak_mb"], direct_stopped=d["stopped"], auto=a["seconds"],
                       auto_mb=a["peak_mb"], auto_method=a["method"], iterations=a["iterations"],
                       converged=a["converged"], diff=diff, truth_err=err, traces=sums.n_traces, unknowns=n_unknown)
        gt = ">" if d["stopped"] else " "
        print(f"n={n:>6} ({n_unknown} unknowns, {sums.n_traces} traces, built in {build:.1f} s): "
              f"direct {gt}{d['seconds']:7.2f} s, peak {gt}{d['peak_mb']:6.0f} MB | "
              f"auto ({a['method']}, {a['iterations']} it) {a['seconds']:7.2f} s, peak {a['peak_mb']:6.0f} MB | "
              f"max |auto - direct| {diff:.0e}, max |auto - truth| {err:.0e}", file=out, flush=True)
    ns = list(rows)
    if len(ns) > 1:
        done = [n for n in ns if not rows[n]["direct_stopped"]]
        direct = (f"direct {_slope(done, [rows[n]['direct'] for n in done]):.2f} ({done[0]}..{done[-1]})"
                  if len(done) > 1 else "direct: fewer than two sizes finished")
        mem = [n for n in ns if rows[n]["auto_mb"] > 0]
        auto_mem = (f", auto memory {_slope(mem, [rows[n]['auto_mb'] for n in mem]):.2f}" if len(mem) > 1 else "")
        print(f"growth exponent (log-log slope of time vs stations, patch, {ns[0]}..{ns[-1]}): "
              f"auto {_slope(ns, [rows[n]['auto'] for n in ns]):.2f}, {direct}{auto_mem}; "
              f"traces {_slope(ns, [rows[n]['traces'] for n in ns]):.2f}", file=out, flush=True)
    return rows


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
    parser.add_argument("--geometry", choices=("both", "grid", "patch"), default="both",
                        help="grid: the sparse grid survey and the phase solve; patch: the densely coupled patch")
    parser.add_argument("--patch-sizes", type=int, nargs="+", default=[500, 1_000, 2_000, 4_000, 8_000])
    parser.add_argument("--patch-freqs", type=int, default=16)
    parser.add_argument("--direct-timeout", type=float, default=10.0,
                        help="seconds after which a direct solve of the patch is stopped")
    args = parser.parse_args(argv)
    if args.geometry in ("both", "grid"):
        run(tuple(args.sizes), args.freqs, args.repeat, args.cg_tol, not args.no_cg)
    if args.geometry in ("both", "patch"):
        run_patch(tuple(args.patch_sizes), args.patch_freqs, args.direct_timeout)


if __name__ == "__main__":
    main()
