"""Surface-consistent log-spectral decomposition (Taner & Koehler 1981; Cary & Lorentz 1993).

Per frequency, the log power of the trace from source ``i`` to receiver
``j`` is modelled as::

    L_ij(f) = s_i(f) + r_j(f) + o_h(ij)(f) [+ c_m(ij)(f)]

with ``o`` an offset-bin term and ``c`` an optional CMP-bin term, solved in
least squares from :class:`~descatter.tasks.statistics.LogPowerSums` alone:
the normal matrix ``N = A^T A`` of the 0/1 design matrix ``A`` has the trace
counts of every term on its diagonal and the cross-count tables off it; the
right-hand sides ``A^T L`` are the per-term sums. ``N`` is the same at every
frequency, so all frequencies are the columns of one sparse system with one
factorisation (or one block of conjugate-gradient iterations).

**Gauge.** ``N`` is singular: a constant can move between the kinds. With
*station components* the connected components of the graph of sources and
receivers linked by a shared trace, and *term components* those of the graph
of every solved term linked by a shared trace, the returned solution has,
per frequency:

- mean source term zero over the sources of each station component;
- mean receiver term zero over the receivers of each term component, when
  the offset term is solved (it then takes the common level);
- mean CMP term zero over the CMP bins of each term component, when solved
  (the offset term, or without one the receiver term, takes its level).

When every station component has offset bins of its own (the usual case,
and every connected survey) the station and term components coincide and
this is: mean source and mean receiver term zero per component, the common
level in the offset term. Station components that share offset bins keep
their relative level, which the shared bins do determine.

Terms with no trace are left out of the system and returned as 0 (flagged
in ``empty``), never NaN. Modes outside the gauge (on regular grids the
CMP term trades linear trends with the stations, Cary & Lorentz 1993) need
``damping > 0``; the direct solver refuses a singular system with a message
that says so, conjugate gradients cannot tell (the fit is still least
squares, the split along such a mode is left as the first guess had it).

**Method.** The direct solve eliminates the unknowns with very many
couplings through a dense Schur complement, and its sparse factor fills
with the couplings of the rest: cheap where each station meets few others,
cubic in time and quadratic in memory where shots record thousands of
channels (a 3D patch makes nearly every station "dense"). There Jacobi-
preconditioned conjugate gradients converge in a few tens of iterations,
in the memory of the normal matrix. ``method="auto"`` (the default) picks
between the two from the structure of the normal matrix
(:func:`_auto_method`).
"""

from __future__ import annotations

import logging
from dataclasses import dataclass

import numpy as np
import scipy.linalg
import scipy.sparse as sp
import scipy.sparse.linalg as sla
from scipy.sparse.csgraph import connected_components

from .errors import ConfigError, GeometryError
from .phase_sync import HPD_LU_OPTIONS, component_labels
from .statistics import LogPowerSums

KINDS = ("source", "receiver", "offset", "cmp")
METHODS = ("auto", "direct", "cg")

log = logging.getLogger(__name__)

# method="auto" takes conjugate gradients when the direct solve would be slow and large:
# - more than AUTO_MAX_DENSE dense unknowns (the Schur complement, or with every unknown
#   dense one sparse LU of a dense matrix). Measured on synthetic 3D patches (every shot
#   recording the receivers within 24 grid steps, 16 frequencies): 300 stations (307 dense)
#   direct 0.01 s, CG 0.01 s; 500 (509) 0.02 s, 0.02 s; 1000 (all 1012) 0.49 s, 0.06 s;
#   2000 (all 2012) 54 s, 0.26 s (CG 12 iterations throughout).
# - or more than AUTO_MAX_COUPLINGS couplings per sparse unknown on average (the fill of the
#   sparse factor). Measured on 20000 stations, patches of 2..8 grid steps, 40 frequencies:
#   33 couplings direct 1.7 s, CG 4.2 s; 54: 5.0 s, 4.3 s; 83: 7.1 s, 4.5 s; and with 16
#   frequencies at 80000 stations, 33: 14 s, 15 s; 55: 21 s (1.8 GB), 16 s (0.16 GB).
#   CG costs grow with the number of frequencies more than the factorisation does: the
#   crossover is near 40 couplings with 16 frequencies and above 100 with 64.
AUTO_MAX_DENSE = 500
AUTO_MAX_COUPLINGS = 50
# CG stops a column whose residual has not fallen by 1% within this many iterations
# (a right-hand side outside the range of a singular matrix, or rounding).
CG_STALL_ITERATIONS = 200

# SuperLU options for a symmetric positive definite matrix: a symmetric
# fill-reducing order and diagonal pivots (Cholesky-like fill, no pivoting);
# the same as the phase solve's for its Hermitian systems.
SPD_LU_OPTIONS = HPD_LU_OPTIONS


@dataclass
class AmplitudeSolution:
    """Log-power terms of every station and bin, gauge applied (module notes).

    source, receiver: float64 [n_sources, n_freq], [n_receivers, n_freq]
    offset, cmp:      float64 [n_offset_bins, n_freq] / [n_cmp_bins, n_freq], or None if not solved
    residual_rms:     float64 [n_freq], sqrt(sum (L - model)^2 / n_traces)
    component:        {kind: int64 [n_kind]} term-component label, -1 for a term with no trace
    station_component: {"source", "receiver": int64 [n]} station-component label, -1 if no trace
    n_components, n_station_components: int
    empty:            {kind: bool [n_kind]} terms with no trace (their values are 0)
    terms:            solved kinds, in the order of the unknown vector
    method:           "direct" or "cg", the one used (also when chosen by "auto")
    iterations:       CG iterations (0 for direct)
    converged:        bool [n_freq] (CG: relative residual below tol; direct: True)
    relative_residual: float64 [n_freq], ||b - M x|| / ||b|| of the normal equations solved
                      (M the normal matrix, plus the damping), before the gauge
    """

    source: np.ndarray
    receiver: np.ndarray
    offset: np.ndarray | None
    cmp: np.ndarray | None
    residual_rms: np.ndarray
    component: dict[str, np.ndarray]
    station_component: dict[str, np.ndarray]
    n_components: int
    n_station_components: int
    empty: dict[str, np.ndarray]
    terms: tuple[str, ...]
    method: str
    iterations: int
    converged: np.ndarray
    relative_residual: np.ndarray

    def term(self, kind: str) -> np.ndarray | None:
        """The [n_kind, n_freq] term of ``kind`` (None if not solved)."""
        if kind not in KINDS:
            raise ConfigError(f"kind = {kind!r}: expected one of {', '.join(KINDS)}")
        return getattr(self, kind)

    @property
    def n_freq(self) -> int:
        return self.residual_rms.shape[0]


# --------------------------------------------------------------------------- normal equations


def _cross_table(sums: LogPowerSums, a: str, b: str) -> np.ndarray:
    """Rows (index in a, index in b, count) int64 [k, 3], whichever way the key is written."""
    if f"{a}|{b}" in sums.cross:
        return np.asarray(sums.cross[f"{a}|{b}"], dtype=np.int64).reshape(-1, 3)
    if f"{b}|{a}" in sums.cross:
        rows = np.asarray(sums.cross[f"{b}|{a}"], dtype=np.int64).reshape(-1, 3)
        return rows[:, [1, 0, 2]]
    raise GeometryError(f"log-power sums have no cross-count table for {a!r} and {b!r} "
                        f"(keys: {sorted(sums.cross)}); expected '{a}|{b}' to solve both terms")


@dataclass
class _System:
    terms: tuple[str, ...]
    sizes: dict[str, int]
    offsets: dict[str, int]   # first unknown of each kind
    normal: sp.csr_matrix     # [n_unknown, n_unknown], every term (empty ones have a zero row)
    rhs: np.ndarray           # [n_unknown, n_freq]
    active: np.ndarray        # bool [n_unknown], terms with at least one trace
    tables: dict[tuple[str, str], np.ndarray]


def _check_terms(terms) -> tuple[str, ...]:
    terms = tuple(terms)
    bad = [t for t in terms if t not in KINDS]
    if bad or len(set(terms)) != len(terms):
        raise ConfigError(f"terms = {terms}: expected distinct kinds from {', '.join(KINDS)}")
    if "source" not in terms or "receiver" not in terms:
        raise ConfigError(f"terms = {terms}: the decomposition needs 'source' and 'receiver'")
    return terms


def _normal_equations(sums: LogPowerSums, terms: tuple[str, ...]) -> _System:
    n_freq = np.asarray(sums.sum_sq).shape[0]
    sizes, offsets, start = {}, {}, 0
    for kind in terms:
        if kind not in sums.sums or kind not in sums.counts:
            raise GeometryError(f"log-power sums have no {kind!r} term (kinds: {sorted(sums.sums)}); "
                                f"drop it from terms or accumulate it")
        s = np.asarray(sums.sums[kind])
        if s.ndim != 2 or s.shape[1] != n_freq or len(sums.counts[kind]) != len(s):
            raise GeometryError(f"{kind!r} sums have shape {s.shape} and {len(sums.counts[kind])} counts; "
                                f"expected [n_{kind}, {n_freq}] and one count per term")
        sizes[kind], offsets[kind] = len(s), start
        start += len(s)
    n = start
    rows, cols, vals, tables = [], [], [], {}
    for kind in terms:
        idx = offsets[kind] + np.arange(sizes[kind])
        rows.append(idx)
        cols.append(idx)
        vals.append(np.asarray(sums.counts[kind], dtype=np.float64))
    for i, a in enumerate(terms):
        for b in terms[i + 1:]:
            t = _cross_table(sums, a, b)
            if len(t) and (t[:, 0].min() < 0 or t[:, 0].max() >= sizes[a] or t[:, 1].min() < 0 or t[:, 1].max() >= sizes[b]):
                raise GeometryError(f"cross-count table {a}|{b} indexes beyond {sizes[a]} {a} and {sizes[b]} {b} terms")
            for kind, col, size in ((a, 0, sizes[a]), (b, 1, sizes[b])):
                got = np.bincount(t[:, col], weights=t[:, 2], minlength=size)
                if not np.array_equal(got, np.asarray(sums.counts[kind], dtype=np.float64)):
                    raise GeometryError(f"cross-count table {a}|{b} holds {int(got.sum())} traces per {kind} term "
                                        f"where the {kind} counts hold {int(np.sum(sums.counts[kind]))}; "
                                        f"the tables must come from the same traces")
            tables[(a, b)] = t
            ra, rb, c = offsets[a] + t[:, 0], offsets[b] + t[:, 1], t[:, 2].astype(np.float64)
            rows += [ra, rb]
            cols += [rb, ra]
            vals += [c, c]
    normal = sp.csr_matrix((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))), shape=(n, n))
    rhs = np.concatenate([np.asarray(sums.sums[k], dtype=np.float64) for k in terms], axis=0)
    active = np.concatenate([np.asarray(sums.counts[k]) > 0 for k in terms])
    return _System(terms, sizes, offsets, normal, rhs, active, tables)


# --------------------------------------------------------------------------- components and gauge


@dataclass
class _Gauge:
    station: dict[str, np.ndarray]   # station-component labels of sources, receivers
    n_station: int
    term: np.ndarray                 # term-component label per unknown (-1 inactive)
    n_term: int
    level: str | None                # kind that takes the CMP level


def _gauge_structure(system: _System) -> _Gauge:
    o, n = system.offsets, len(system.active)
    ns, nr = system.sizes["source"], system.sizes["receiver"]
    sr = system.tables[("source", "receiver")]
    sr = sr[sr[:, 2] > 0]
    act_sr = np.concatenate([system.active[o["source"]: o["source"] + ns], system.active[o["receiver"]: o["receiver"] + nr]])
    st, n_st = component_labels(ns + nr, sr[:, 0], ns + sr[:, 1], act_sr)
    a = np.concatenate([o[p] + t[t[:, 2] > 0, 0] for (p, q), t in system.tables.items()])
    b = np.concatenate([o[q] + t[t[:, 2] > 0, 1] for (p, q), t in system.tables.items()])
    term, n_term = component_labels(n, a, b, system.active)
    level = None if "cmp" not in system.terms else ("offset" if "offset" in system.terms else "receiver")
    return _Gauge({"source": st[:ns], "receiver": st[ns:]}, n_st, term, n_term, level)


def _group_mean(x: np.ndarray, labels: np.ndarray, n_groups: int) -> np.ndarray:
    """Mean of the rows of x [n, n_freq] per label (-1 left out): float64 [n_groups, n_freq]."""
    keep = labels >= 0
    m = sp.csr_matrix((np.ones(keep.sum()), (labels[keep], np.flatnonzero(keep))), shape=(n_groups, len(labels)))
    count = np.maximum(np.asarray(m.sum(axis=1)).ravel(), 1.0)
    return (m @ x) / count[:, None]


def _apply_gauge(x: np.ndarray, system: _System, gauge: _Gauge) -> np.ndarray:
    """Add null vectors of the design matrix so the gauge constraints hold (closed form:
    the three steps touch the constraints in a triangular order)."""
    x = x.copy()
    o, size = system.offsets, system.sizes
    part = {k: slice(o[k], o[k] + size[k]) for k in system.terms}
    term_of = {k: gauge.term[part[k]] for k in system.terms}
    # 1. per station component: sources - m, receivers + m
    st_s, st_r = gauge.station["source"], gauge.station["receiver"]
    m = _group_mean(x[part["source"]], st_s, gauge.n_station)
    x[part["source"]] -= np.where((st_s >= 0)[:, None], m[np.maximum(st_s, 0)], 0.0)
    x[part["receiver"]] += np.where((st_r >= 0)[:, None], m[np.maximum(st_r, 0)], 0.0)
    # 2. per term component: receivers - mu, offsets + mu
    if "offset" in system.terms:
        t_r, t_o = term_of["receiver"], term_of["offset"]
        mu = _group_mean(x[part["receiver"]], t_r, gauge.n_term)
        x[part["receiver"]] -= np.where((t_r >= 0)[:, None], mu[np.maximum(t_r, 0)], 0.0)
        x[part["offset"]] += np.where((t_o >= 0)[:, None], mu[np.maximum(t_o, 0)], 0.0)
    # 3. per term component: cmp - nu, level kind + nu
    if gauge.level is not None:
        t_c, t_l = term_of["cmp"], term_of[gauge.level]
        nu = _group_mean(x[part["cmp"]], t_c, gauge.n_term)
        x[part["cmp"]] -= np.where((t_c >= 0)[:, None], nu[np.maximum(t_c, 0)], 0.0)
        x[part[gauge.level]] += np.where((t_l >= 0)[:, None], nu[np.maximum(t_l, 0)], 0.0)
    return x


def _pins(system: _System, gauge: _Gauge) -> np.ndarray:
    """Unknowns fixed at 0 so the pinned normal matrix is nonsingular: the first source of
    each station component, the first receiver of each term component (with an offset
    term) and the first CMP bin of each term component (with a CMP term). The null vectors
    restricted to these rows form a unit triangular matrix."""
    o = system.offsets

    def first(labels: np.ndarray, start: int, n_groups: int) -> np.ndarray:
        keep = np.flatnonzero(labels >= 0)
        where = np.full(n_groups, len(labels), np.int64)
        np.minimum.at(where, labels[keep], keep)
        return start + where[where < len(labels)]

    pins = [first(gauge.station["source"], o["source"], gauge.n_station)]
    if "offset" in system.terms:
        r = gauge.term[o["receiver"]: o["receiver"] + system.sizes["receiver"]]
        pins.append(first(r, o["receiver"], gauge.n_term))
    if "cmp" in system.terms:
        c = gauge.term[o["cmp"]: o["cmp"] + system.sizes["cmp"]]
        pins.append(first(c, o["cmp"], gauge.n_term))
    return np.concatenate(pins)


# --------------------------------------------------------------------------- solvers


def _dense_unknowns(matrix: sp.csr_matrix) -> np.ndarray:
    """Unknowns coupled to very many others (offset bins touch most stations): bool [n].
    Eliminated last through a small dense Schur complement, they keep the sparse
    ordering fast and the fill low."""
    n = matrix.shape[0]
    return np.diff(matrix.indptr) > max(100, 4 * int(np.sqrt(n)))


def _factor(matrix: sp.csc_matrix, system: _System):
    try:
        lu = sla.splu(matrix, **SPD_LU_OPTIONS)
    except RuntimeError as exc:  # SuperLU: "Factor is exactly singular"
        raise _singular_error(system) from exc
    pivots = np.abs(lu.U.diagonal())
    if not np.all(np.isfinite(pivots)) or pivots.min() <= 1e-10 * pivots.max():
        raise _singular_error(system)
    return lu


def _direct(system: _System, gauge: _Gauge, damping: float) -> np.ndarray:
    """Sparse LU (SPD options) of the pinned (or damped) normal matrix, all columns at once.

    With ``N_RR = [[A, B], [B^T, C]]``, ``C`` the few dense unknowns: ``A`` is factored
    sparse, then ``S = C - B^T A^-1 B`` (small, dense) gives
    ``x_C = S^-1 (b_C - B^T A^-1 b_A)`` and ``x_A = A^-1 (b_A - B x_C)``."""
    n = len(system.active)
    solve_for = system.active.copy()
    matrix = system.normal
    if damping > 0:
        matrix = matrix + sp.diags(damping * _mean_count(system) * system.active.astype(np.float64))
    else:
        solve_for[_pins(system, gauge)] = False
    idx = np.flatnonzero(solve_for)
    x = np.zeros((n, system.rhs.shape[1]))
    if len(idx) == 0:
        return x
    reduced = matrix[idx][:, idx].tocsr()
    rhs = system.rhs[idx]
    dense = _dense_unknowns(reduced)
    if not dense.any() or dense.all():
        x[idx] = _factor(reduced.tocsc(), system).solve(np.ascontiguousarray(rhs))
        return x
    sparse_part, dense_part = np.flatnonzero(~dense), np.flatnonzero(dense)
    a = reduced[sparse_part][:, sparse_part].tocsc()
    b = reduced[sparse_part][:, dense_part].toarray()
    c = reduced[dense_part][:, dense_part].toarray()
    lu = _factor(a, system)
    y = lu.solve(np.ascontiguousarray(b))
    schur = c - b.T @ y
    # S is symmetric positive definite when the pinned system is regular: a Cholesky factor
    # proves it and solves with it; a tiny pivot ratio (squared: the factor holds square roots)
    # marks a numerically singular one. (A dense SVD condition number cost 0.3 s of a 1 s solve
    # on the demo survey; the Cholesky test costs a few ms.)
    try:
        factor = scipy.linalg.cho_factor(schur, lower=True, check_finite=True)
    except (np.linalg.LinAlgError, ValueError) as exc:
        raise _singular_error(system) from exc
    pivots = np.abs(np.diag(factor[0]))
    if pivots.min() ** 2 <= 1e-12 * pivots.max() ** 2:
        raise _singular_error(system)
    u = lu.solve(np.ascontiguousarray(rhs[sparse_part]))
    x_dense = scipy.linalg.cho_solve(factor, rhs[dense_part] - b.T @ u)
    out = np.empty_like(rhs)
    out[dense_part] = x_dense
    out[sparse_part] = u - y @ x_dense
    x[idx] = out
    return x


def _singular_error(system: _System) -> GeometryError:
    extra = " (with a CMP term, linear trends trade between the CMP and station terms on regular grids)" \
        if "cmp" in system.terms else ""
    return GeometryError(f"the normal equations of terms {system.terms} are singular beyond the gauge{extra}; "
                         f"pass damping > 0 (for example 1e-3) or drop a term")


def _mean_count(system: _System) -> float:
    d = system.normal.diagonal()[system.active]
    return float(d.mean()) if len(d) else 1.0


def _active_matrix(system: _System) -> sp.csr_matrix:
    """The normal matrix on the terms with traces (the matrix itself when all have)."""
    if system.active.all():
        return system.normal
    idx = np.flatnonzero(system.active)
    return system.normal[idx][:, idx].tocsr()


def _auto_method(matrix: sp.csr_matrix) -> str:
    """"direct" or "cg" for the active normal matrix (constants and measurements at the top).

    CG where the direct solve's dense block exceeds ``AUTO_MAX_DENSE`` unknowns, or where
    the sparse unknowns have more than ``AUTO_MAX_COUPLINGS`` couplings to other sparse
    unknowns on average; the direct solve otherwise. Costs O(nnz)."""
    dense = _dense_unknowns(matrix)
    if dense.sum() > AUTO_MAX_DENSE:
        return "cg"
    sparse_rows = ~dense
    n_sparse = int(sparse_rows.sum())
    if n_sparse == 0:
        return "direct"
    in_sparse_row = np.repeat(sparse_rows, np.diff(matrix.indptr))
    links = np.count_nonzero(in_sparse_row & sparse_rows[matrix.indices]) - n_sparse  # less the diagonal
    return "cg" if links > AUTO_MAX_COUPLINGS * n_sparse else "direct"


def _cg(matrix: sp.csr_matrix, b: np.ndarray, x0: np.ndarray | None, tol: float, maxiter: int,
        stall: int = CG_STALL_ITERATIONS):
    """Jacobi-preconditioned conjugate gradients, one independent CG per column, vectorised.

    ``matrix`` symmetric positive semidefinite [m, m] with a positive diagonal, ``b``
    [m, n_freq]. Without damping the normal matrix is singular but the right-hand sides
    lie in its range (to rounding), so CG converges; the null-space part of ``x0`` stays
    put and the gauge removes it afterwards. A column stops when its residual is below
    ``tol * ||b||`` (converged), when ``p^T M p`` is not positive (breakdown: the rest of
    the residual lies in the null space, the right-hand side is not in the range) or not
    finite, or when its residual has not fallen by 1% in ``stall`` iterations (stagnation);
    only the first counts as converged. A column that did not converge returns its iterate
    of least residual: past the rounding floor of a singular system the iterates drift
    along the null space and lose accuracy. Returns x [m, n_freq], iterations, converged
    bool [n_freq]."""
    x = np.zeros_like(b) if x0 is None else np.array(x0, dtype=np.float64)
    inv_d = 1.0 / matrix.diagonal()
    r = b - matrix @ x
    z = inv_d[:, None] * r
    p = z.copy()
    rz = np.einsum("ij,ij->j", r, z)
    norm_b = np.maximum(np.linalg.norm(b, axis=0), np.finfo(float).tiny)
    res = np.linalg.norm(r, axis=0)
    done = res <= tol * norm_b
    stopped = done.copy()
    best, best_it = res.copy(), np.zeros(len(res), np.int64)
    x_least, res_least = x.copy(), res.copy()
    it = 0
    while not stopped.all() and it < maxiter:
        q = matrix @ p
        pq = np.einsum("ij,ij->j", p, q)
        running = ~stopped & (pq > 0) & np.isfinite(pq) & (rz > 0)
        stopped |= ~running
        alpha = np.where(running, rz / np.where(running, pq, 1.0), 0.0)
        x += alpha * p
        r -= alpha * q
        it += 1
        res = np.linalg.norm(r, axis=0)
        done |= running & (res <= tol * norm_b)
        better = running & (res < 0.99 * best)
        best, best_it = np.where(better, res, best), np.where(better, it, best_it)
        lower = running & ~done & (res < res_least)
        if lower.any():
            x_least[:, lower] = x[:, lower]
            res_least = np.where(lower, res, res_least)
        stopped |= done | ~np.isfinite(res) | (it - best_it >= stall)
        z = inv_d[:, None] * r
        rz_new = np.einsum("ij,ij->j", r, z)
        beta = np.where(stopped, 0.0, rz_new / np.where(rz > 0, rz, 1.0))
        p = z + beta * p
        rz = rz_new
    if not done.all():
        x[:, ~done] = x_least[:, ~done]
    return x, it, done


def amplitude_solve(
    sums: LogPowerSums,
    *,
    terms: tuple[str, ...] = ("source", "receiver", "offset"),
    damping: float = 0.0,
    warm_start: AmplitudeSolution | None = None,
    method: str = "auto",
    tol: float = 1e-10,
    maxiter: int = 5000,
) -> AmplitudeSolution:
    """Least-squares surface-consistent decomposition of the log power, every frequency.

    Solves ``min_x ||A x - L||^2 + damping * mean_count * ||x||^2`` (Tikhonov damping)
    per frequency column through the normal equations
    ``(N + damping * mean_count * I) x = A^T L`` assembled from ``sums`` (``N`` = counts
    on the diagonal, cross counts off it; ``mean_count`` the mean trace count of a term,
    so ``damping`` is scale-free), then applies the gauge of the module notes.

    ``method="direct"``: one sparse LU of the pinned normal matrix (one term per null
    vector fixed at 0; the few dense offset-bin unknowns through a Schur complement)
    for all columns; best where each station meets few others. ``"cg"``:
    Jacobi-preconditioned CG on every column to relative residual ``tol``, with
    ``warm_start`` (a solution of the same terms) as the first guess; best where shots
    record thousands of channels each, which fills a factorisation but makes CG
    converge fast. ``"auto"`` (default): one of the two from the structure of ``N``
    (:func:`_auto_method`); the solution's ``method`` says which. The two agree to the
    CG tolerance: the relative residual of the normal equations below ``tol``, the terms
    to about ``tol`` times the condition number of ``N`` (typically 1e-9..1e-6 with
    ``tol = 1e-10``). A CG column that stops short of ``tol`` (``maxiter``, breakdown or
    stagnation, see :func:`_cg`) is flagged in ``converged``, its residual reported in
    ``relative_residual`` and a warning logged. ``residual_rms`` comes from the sums
    (``sum L^2 - 2 x.A^T L + x.N x``): misfits below about ``1e-8`` times the rms of
    ``L`` are lost to rounding.

    sums: LogPowerSums with ``sums[kind]`` float64 [n_kind, n_freq], ``counts[kind]`` int64
    [n_kind] and the cross-count tables of every pair of ``terms``. Returns an
    :class:`AmplitudeSolution` (terms float64 [n_kind, n_freq]).
    """
    terms = _check_terms(terms)
    if method not in METHODS:
        raise ConfigError(f"method = {method!r}: expected one of {', '.join(METHODS)}")
    if not (np.isfinite(damping) and damping >= 0):
        raise ConfigError(f"damping = {damping}: expected a number >= 0")
    system = _normal_equations(sums, terms)
    gauge = _gauge_structure(system)
    n_freq = system.rhs.shape[1]
    idx = np.flatnonzero(system.active)
    active = _active_matrix(system)
    if method == "auto":
        method = _auto_method(active)
    shift = damping * _mean_count(system) if damping > 0 else 0.0
    matrix = active + sp.identity(len(idx), format="csr") * shift if shift > 0 else active
    b = system.rhs[idx]
    if method == "direct":
        x = _direct(system, gauge, damping)
        iterations, converged = 0, np.ones(n_freq, bool)
    else:
        x0 = None
        if warm_start is not None:
            parts = [warm_start.term(k) for k in terms]
            if any(p is None for p in parts) or sum(len(p) for p in parts) != len(system.active) \
                    or parts[0].shape[1] != n_freq:
                raise ConfigError("warm_start does not match these sums: expected a solution of the same terms, "
                                  "term counts and frequencies")
            x0 = np.concatenate(parts, axis=0)[idx]
        x = np.zeros_like(system.rhs)
        x[idx], iterations, converged = _cg(matrix, b, x0, tol, maxiter)
    norm_b = np.maximum(np.linalg.norm(b, axis=0), np.finfo(float).tiny)
    relative = np.linalg.norm(b - matrix @ x[idx], axis=0) / norm_b
    if not converged.all():
        bad = np.flatnonzero(~converged)
        log.warning("amplitude_solve: conjugate gradients did not reach tol = %.1e at %d of %d frequencies "
                    "(columns %s) after %d iterations (maxiter %d); relative residual up to %.1e. Raise maxiter, "
                    "loosen tol, pass damping > 0 or method='direct'", tol, len(bad), n_freq,
                    np.array2string(bad, threshold=8), iterations, maxiter, float(relative[bad].max()))
    x = _apply_gauge(x, system, gauge)
    nx = system.normal @ x
    rss = np.asarray(sums.sum_sq, dtype=np.float64) - 2 * np.einsum("ij,ij->j", x, system.rhs) + np.einsum("ij,ij->j", x, nx)
    residual = np.sqrt(np.maximum(rss, 0.0) / max(int(sums.n_traces), 1))

    def block(kind: str) -> np.ndarray | None:
        if kind not in terms:
            return None
        o = system.offsets[kind]
        return x[o: o + system.sizes[kind]]

    component = {k: gauge.term[system.offsets[k]: system.offsets[k] + system.sizes[k]] for k in terms}
    empty = {k: ~system.active[system.offsets[k]: system.offsets[k] + system.sizes[k]] for k in terms}
    return AmplitudeSolution(
        source=block("source"), receiver=block("receiver"), offset=block("offset"), cmp=block("cmp"),
        residual_rms=residual, component=component, station_component=gauge.station,
        n_components=gauge.n_term, n_station_components=gauge.n_station, empty=empty, terms=terms,
        method=method, iterations=int(iterations), converged=np.asarray(converged, bool),
        relative_residual=relative,
    )


# --------------------------------------------------------------------------- from pair cross-spectra


def pair_amplitude_solve(pairs, cross, count, *, prior: np.ndarray, damping: float = 1e-3,
                         floor: float = 1e-6) -> np.ndarray:
    """Station log-power terms from the magnitudes of pair cross-spectral sums.

    With ``X_jk = sum_i D_ij conj(D_ik)`` (:class:`~descatter.tasks.statistics.PairSums`),
    ``|X_jk| ~ |R_j| |R_k| P_jk`` where ``P_jk`` is the power of what the two traces share
    (source and earth), much the same for neighbouring pairs; so per frequency
    ``log |X_jk| = a_j + a_k + c_g`` with ``a = r / 2`` the station's half log-power term and
    ``c_g`` one level per connected component ``g`` of the pair graph. Solved as
    ``min sum_p count_p (log |X_p| - a_j - a_k - c_g)^2 + lam sum_j (a_j - prior_j / 2)^2``,
    ``lam = damping`` times the mean count-weighted degree, one sparse LU for all
    frequencies. The prior (the log-power term of :func:`amplitude_solve`) holds what the
    pairs leave open: the common level of each component (mean ``a`` equals the prior's
    mean there, so the log-power gauge carries over), a station without pairs, and the
    alternating mode of a bipartite graph (a chain of pairs); elsewhere the pairs decide.

    Why: random noise adds to ``log |D|^2`` a floor that flattens a station's spectrum
    where the signal is weak (``E log(|s|^2 + |n|^2)``), but averages out of the cross
    products of two traces. Measured on the synthetic scattering surveys (frequency-
    smoothed pair sums): correlation of the estimated relative amplitude spectra with the
    truth 0.93 -> 0.96 (tiny) and 0.93 -> 0.97 (demo).

    pairs int [m, 2] station indices; cross complex [m, n_freq]; count int [m] (shots or
    receivers per pair); prior float [n, n_freq] log-power terms (its rows fix
    ``n_stations``). ``|X|`` is floored at ``floor`` times its mean over the pairs of that
    frequency, as in :func:`~descatter.tasks.log_power.log_power`. Returns float64
    [n, n_freq], the log-power terms ``r = 2 a``.
    """
    prior = np.asarray(prior, dtype=np.float64)
    if prior.ndim != 2:
        raise ConfigError(f"prior: got shape {prior.shape}; expected [n_stations, n_freq]")
    n, n_freq = prior.shape
    p = np.asarray(pairs, dtype=np.int64).reshape(-1, 2)
    x = np.asarray(cross)
    w = np.asarray(count, dtype=np.float64).reshape(-1)
    if x.shape != (len(p), n_freq) or w.shape != (len(p),):
        raise ConfigError(f"cross {x.shape} and count {w.shape} must be [{len(p)}, {n_freq}] and [{len(p)}] "
                          "for these pairs and the prior's frequencies")
    if len(p) and (p.min() < 0 or p.max() >= n):
        raise ConfigError(f"pairs index stations {p.min()}..{p.max()}; expected 0..{n - 1} (the prior's rows)")
    if not (np.isfinite(damping) and damping > 0 and np.isfinite(floor) and floor > 0):
        raise ConfigError(f"damping = {damping}, floor = {floor}: expected numbers > 0")
    keep = w > 0
    p, x, w = p[keep], x[keep], w[keep]
    if len(p) == 0:
        return prior.copy()
    mag = np.abs(x)
    mean = mag.mean(axis=0, keepdims=True)
    y = np.log(np.maximum(mag, floor * np.where(mean > 0, mean, 1.0)))
    n_groups, labels = connected_components(
        sp.coo_matrix((np.ones(len(p)), (p[:, 0], p[:, 1])), shape=(n, n)), directed=False)
    rows = np.repeat(np.arange(len(p)), 3)
    cols = np.column_stack([p[:, 0], p[:, 1], n + labels[p[:, 0]]]).ravel()
    design = sp.csr_matrix((np.ones(3 * len(p)), (rows, cols)), shape=(len(p), n + n_groups))
    weighted = sp.diags(w) @ design
    degree = np.bincount(p.ravel(), weights=np.repeat(w, 2), minlength=n)
    lam = damping * max(degree[degree > 0].mean(), 1.0)
    reg = np.concatenate([np.full(n, lam), np.zeros(n_groups)])
    # a level with no pair (a group of one station) is held at 0 so the matrix stays regular
    used = np.bincount(labels[p[:, 0]], minlength=n_groups) > 0
    reg[n:] = np.where(used, 0.0, 1.0)
    normal = (design.T @ weighted + sp.diags(reg)).tocsc()
    rhs = weighted.T @ y
    rhs[:n] += lam * 0.5 * prior
    sol = sla.splu(normal, **SPD_LU_OPTIONS).solve(np.ascontiguousarray(rhs))
    return 2.0 * sol[:n]
