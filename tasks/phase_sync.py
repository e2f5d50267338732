"""Phase synchronisation of station pairs (Singer 2011), one frequency at a time.

For pairs (j, k) with cross-spectral sums ``X_jk ~ R_j conj(R_k)`` (receiver
pairs of one shot; source pairs likewise), find unit complex ``z_j`` per
frequency with ``z_j conj(z_k) ~ h_jk = X_jk / |X_jk|``, weighted by
``w_jk`` (coherence times count, chosen by the caller). No unwrapping is
involved and frequencies are independent.

Two estimators:

- ``"laplacian"`` (default): the pinned connection-Laplacian least squares
  ``min sum_jk w_jk |z_j - h_jk z_k|^2`` with one station per connected
  component fixed at ``z = 1``: the Hermitian positive definite system
  ``(D - H)_RR z_R = H_RP 1`` (``D`` the weighted degrees, ``H_jk = w_jk h_jk``,
  ``R`` the free and ``P`` the pinned stations), one sparse LU per frequency,
  then ``z / |z|``. Exact on consistent data and on any tree (a chain
  included), where eigensolvers struggle with the small spectral gap. With
  noise on graphs with cycles, ``|z|`` decays away from the pin; the direct
  solve keeps the phases of the small values (iterative solvers with a
  relative tolerance would not).
- ``"eigen"``: the leading eigenvector of the sparse Hermitian ``H`` of each
  component (Singer 2011), by ARPACK (``scipy.sparse.linalg.eigsh``); where
  ARPACK does not converge the component falls back to the Laplacian
  solution, with a logged warning.

**Gauge.** Per frequency and per connected component, mean phase zero: with
``S = sum_j z_j`` over the component, ``z_j <- z_j conj(S) / |S|`` (a circular
mean of zero; left as is if ``|S|`` vanishes). Stations without a usable pair
(``isolated``) get ``z = 1``. An edge is usable at a frequency when its
weight is positive and finite and its cross sum nonzero and finite; the
components of the graph of pairs usable at any frequency are reported, and
a frequency at which that graph falls apart further is solved per piece
(``frequency_components``).

Frequencies can be solved in blocks (``columns=``) on different workers and
joined with :func:`concat_phase_solutions`.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as sla
from scipy.sparse.csgraph import connected_components

from .errors import ConfigError, GeometryError

log = logging.getLogger(__name__)

METHODS = ("laplacian", "eigen")

# SuperLU options for a Hermitian positive definite matrix: symmetric order, diagonal pivots.
HPD_LU_OPTIONS = dict(permc_spec="MMD_AT_PLUS_A", diag_pivot_thresh=0.0, options=dict(SymmetricMode=True))
# components up to this size take a dense eigendecomposition (ARPACK needs more than k + 1 rows)
_DENSE_EIGEN_MAX = 16
_RESIDUAL_BLOCK = 8  # frequency columns per residual block, to bound temporaries


def component_labels(n: int, a: np.ndarray, b: np.ndarray, active: np.ndarray) -> tuple[np.ndarray, int]:
    """Connected components of the undirected graph with edges (a[e], b[e]) on n nodes.

    Returns int64 [n] labels numbered 0, 1, ... in order of each component's lowest
    node, -1 for nodes not ``active``, and the number of components of active nodes.
    Edges must join active nodes only.
    """
    active = np.asarray(active, bool)
    if n == 0:
        return np.zeros(0, np.int64), 0
    graph = sp.csr_matrix((np.ones(len(a)), (np.asarray(a), np.asarray(b))), shape=(n, n))
    n_raw, raw = connected_components(graph, directed=False)
    nodes = np.flatnonzero(active)
    first = np.full(n_raw, n, dtype=np.int64)
    np.minimum.at(first, raw[nodes], nodes)
    rank = np.empty(n_raw, np.int64)
    rank[np.argsort(first, kind="stable")] = np.arange(n_raw)
    labels = np.where(active, rank[raw], -1).astype(np.int64)
    return labels, int(np.count_nonzero(first < n))


@dataclass
class PhaseSolution:
    """Station phases per frequency, gauge applied (module notes).

    z:                    complex128 [n_stations, n_freq], |z| = 1
    component:            int64 [n_stations], component of the graph of usable pairs, -1 isolated
    n_components:         int
    residual:             float64 [n_freq], sum w |z_j conj(z_k) - h_jk|^2 / sum w over usable pairs (0..4)
    station_residual:     float64 [n_stations, n_freq], the same over each station's pairs (0 if none)
    isolated:             bool [n_stations], no usable pair at any frequency (z = 1)
    frequency_components: int64 [n_freq], components solved at each frequency (>= n_components)
    columns:              int64 [n_freq], the input frequency columns these are
    method:               "laplacian" or "eigen"
    """

    z: np.ndarray
    component: np.ndarray
    n_components: int
    residual: np.ndarray
    station_residual: np.ndarray
    isolated: np.ndarray
    frequency_components: np.ndarray
    columns: np.ndarray
    method: str


# --------------------------------------------------------------------------- inputs


def _check_inputs(pairs, cross, weight, n_stations):
    pairs = np.asarray(pairs)
    if pairs.ndim != 2 or pairs.shape[1] != 2 or not np.issubdtype(pairs.dtype, np.integer):
        raise GeometryError(f"pairs: got {pairs.dtype} {pairs.shape}; expected int [n_pairs, 2] station indices")
    pairs = pairs.astype(np.int64)
    if len(pairs) and (pairs.min() < 0 or pairs.max() >= n_stations):
        raise GeometryError(f"pairs index stations {pairs.min()}..{pairs.max()}; expected 0..{n_stations - 1} "
                            f"(n_stations = {n_stations})")
    if np.any(pairs[:, 0] == pairs[:, 1]):
        raise GeometryError("pairs hold a station paired with itself; expected two different stations per row")
    cross = np.asarray(cross)
    if cross.ndim != 2 or cross.shape[0] != len(pairs):
        raise ConfigError(f"cross: got shape {cross.shape}; expected [{len(pairs)}, n_freq], one row per pair")
    weight = np.asarray(weight, dtype=np.float64)
    if weight.ndim == 1:
        weight = np.broadcast_to(weight[:, None], cross.shape)
    if weight.shape != cross.shape:
        raise ConfigError(f"weight: got shape {weight.shape}; expected {cross.shape} like cross (or [{len(pairs)}])")
    return pairs, cross, weight


def _usable(cross: np.ndarray, weight: np.ndarray) -> np.ndarray:
    """bool, same shape: weight > 0 and finite, cross nonzero and finite."""
    with np.errstate(invalid="ignore"):
        return (weight > 0) & np.isfinite(weight) & np.isfinite(cross) & (cross != 0)


# --------------------------------------------------------------------------- per-frequency structure


@dataclass
class _Structure:
    """Everything of one frequency that depends only on which pairs are usable."""

    edges: np.ndarray        # int64 [m_live] rows of the usable pairs
    labels: np.ndarray       # int64 [n] component at this frequency, -1 no usable pair
    n_components: int
    pins: np.ndarray         # int64 [n_components] the lowest station of each component
    free: np.ndarray         # int64 [n_free] stations solved for (labelled, not pinned)
    slot: np.ndarray         # int64 [n_entries] matrix slot of each entry
    indices: np.ndarray      # CSC row indices of the slots
    indptr: np.ndarray
    entry_edge: np.ndarray   # int64 [n_entries] edge (into edges) of each entry
    entry_kind: np.ndarray   # int8: 0 degree, 1 -H (a, b), 2 -conj(H) (b, a)
    rhs_row: np.ndarray      # int64, free row receiving each pin coupling
    rhs_edge: np.ndarray     # edge of each pin coupling
    rhs_conj: np.ndarray     # bool, conj(H) (the pin is station a) or H (the pin is b)


def _structure(pairs: np.ndarray, live: np.ndarray, n: int) -> _Structure:
    edges = np.flatnonzero(live)
    a, b = pairs[edges, 0], pairs[edges, 1]
    has = np.zeros(n, bool)
    has[a] = has[b] = True
    labels, k = component_labels(n, a, b, has)
    pins = np.full(k, n, np.int64)
    np.minimum.at(pins, labels[has], np.flatnonzero(has))
    is_free = has.copy()
    is_free[pins] = False
    free = np.flatnonzero(is_free)
    row = np.full(n, -1, np.int64)
    row[free] = np.arange(len(free))
    ra, rb = row[a], row[b]
    e = np.arange(len(edges))
    both = (ra >= 0) & (rb >= 0)
    r_parts = [ra[ra >= 0], rb[rb >= 0], ra[both], rb[both]]
    c_parts = [ra[ra >= 0], rb[rb >= 0], rb[both], ra[both]]
    entry_edge = np.concatenate([e[ra >= 0], e[rb >= 0], e[both], e[both]])
    entry_kind = np.concatenate([np.zeros((ra >= 0).sum() + (rb >= 0).sum(), np.int8),
                                 np.ones(both.sum(), np.int8), np.full(both.sum(), 2, np.int8)])
    r_all, c_all = np.concatenate(r_parts), np.concatenate(c_parts)
    nf = len(free)
    linear, slot = np.unique(c_all * np.int64(max(nf, 1)) + r_all, return_inverse=True)
    cols = linear // max(nf, 1)
    indptr = np.concatenate([[0], np.cumsum(np.bincount(cols, minlength=nf))]).astype(np.int64)
    pin_b = (ra >= 0) & (rb < 0)   # b is the pin: row a gets H_ab z_b
    pin_a = (rb >= 0) & (ra < 0)   # a is the pin: row b gets conj(H_ab) z_a
    return _Structure(
        edges=edges, labels=labels, n_components=k, pins=pins, free=free, slot=slot.reshape(-1),
        indices=(linear % max(nf, 1)).astype(np.int64), indptr=indptr, entry_edge=entry_edge, entry_kind=entry_kind,
        rhs_row=np.concatenate([ra[pin_b], rb[pin_a]]), rhs_edge=np.concatenate([e[pin_b], e[pin_a]]),
        rhs_conj=np.concatenate([np.zeros(pin_b.sum(), bool), np.ones(pin_a.sum(), bool)]),
    )


def _laplacian(st: _Structure, hw: np.ndarray, w: np.ndarray, n: int) -> np.ndarray:
    """Pinned connection-Laplacian solution z [n] (unnormalised; 1 at pins and isolated)."""
    z = np.ones(n, np.complex128)
    if len(st.free) == 0:
        return z
    values = np.where(st.entry_kind == 0, w[st.entry_edge],
                      np.where(st.entry_kind == 1, -hw[st.entry_edge], -np.conj(hw[st.entry_edge])))
    n_slots = len(st.indices)
    data = np.bincount(st.slot, weights=values.real, minlength=n_slots) \
        + 1j * np.bincount(st.slot, weights=values.imag, minlength=n_slots)
    nf = len(st.free)
    matrix = sp.csc_matrix((data, st.indices, st.indptr), shape=(nf, nf))
    coupling = np.where(st.rhs_conj, np.conj(hw[st.rhs_edge]), hw[st.rhs_edge])
    rhs = np.bincount(st.rhs_row, weights=coupling.real, minlength=nf) \
        + 1j * np.bincount(st.rhs_row, weights=coupling.imag, minlength=nf)
    lu = sla.splu(matrix, **HPD_LU_OPTIONS)
    z[st.free] = lu.solve(rhs)
    return z


def _hermitian(st: _Structure, pairs: np.ndarray, hw: np.ndarray, n: int) -> sp.csr_matrix:
    a, b = pairs[st.edges, 0], pairs[st.edges, 1]
    h = sp.coo_matrix((np.concatenate([hw, np.conj(hw)]), (np.concatenate([a, b]), np.concatenate([b, a]))),
                      shape=(n, n))
    return h.tocsr()


def _eigen(st: _Structure, pairs, hw, w, n, tol, maxiter, column, start=None) -> np.ndarray:
    """Leading eigenvector of H per component (unnormalised); Laplacian fallback.

    start: optional complex [n], ARPACK's starting vector (a warm start from
    an earlier solution); zero or non-finite entries start from 1."""
    z = np.ones(n, np.complex128)
    if st.n_components == 0:
        return z
    h = _hermitian(st, pairs, hw, n)
    nodes = np.flatnonzero(st.labels >= 0)
    order = nodes[np.argsort(st.labels[nodes], kind="stable")]
    bounds = np.concatenate([[0], np.cumsum(np.bincount(st.labels[nodes], minlength=st.n_components))])
    hp = h[order][:, order].tocsr()
    fallback = None
    for c in range(st.n_components):
        lo, hi = bounds[c], bounds[c + 1]
        block = hp[lo:hi, lo:hi]
        idx = order[lo:hi]
        if hi - lo <= _DENSE_EIGEN_MAX:  # a bounded, small block: dense is exact and cheaper
            z[idx] = np.linalg.eigh(block.toarray())[1][:, -1]
            continue
        try:
            v0 = np.ones(hi - lo, np.complex128)
            if start is not None:
                s0 = start[idx]
                ok = np.isfinite(s0) & (s0 != 0)
                v0[ok] = s0[ok]
            z[idx] = sla.eigsh(block, k=1, which="LA", v0=v0, tol=tol, maxiter=maxiter)[1][:, 0]
        except sla.ArpackNoConvergence:
            log.warning("phase_sync: ARPACK did not converge on a component of %d stations at column %d; "
                        "using the pinned Laplacian solution there", hi - lo, column)
            if fallback is None:
                fallback = _laplacian(st, hw, w, n)
            z[idx] = fallback[idx]
    return z


def _normalise_and_gauge(z: np.ndarray, labels: np.ndarray, n_components: int, column: int) -> np.ndarray:
    mag = np.abs(z)
    bad = ~(np.isfinite(mag) & (mag > np.finfo(float).tiny))
    if np.any(bad & (labels >= 0)):
        log.warning("phase_sync: %d stations have no resolvable phase at column %d (|z| underflowed); "
                    "set to phase 0", int(np.sum(bad & (labels >= 0))), column)
    z = np.where(bad, 1.0 + 0j, z / np.where(bad, 1.0, mag))
    keep = labels >= 0
    if n_components:
        s = np.bincount(labels[keep], weights=z[keep].real, minlength=n_components) \
            + 1j * np.bincount(labels[keep], weights=z[keep].imag, minlength=n_components)
        size = np.bincount(labels[keep], minlength=n_components)
        ok = np.abs(s) > 1e-12 * size
        g = np.where(ok, np.conj(s) / np.where(ok, np.abs(s), 1.0), 1.0)
        z = np.where(keep, z * g[np.maximum(labels, 0)], 1.0 + 0j)
    return z


def _residuals(pairs, cross, weight, live, z):
    """Weighted mean |z_j conj(z_k) - h_jk|^2 per column and per station and column."""
    n, nf = z.shape
    m = len(pairs)
    a, b = pairs[:, 0], pairs[:, 1]
    incidence = sp.csr_matrix((np.ones(2 * m), (np.concatenate([a, b]), np.tile(np.arange(m), 2))), shape=(n, m))
    total = np.zeros(nf)
    station = np.zeros((n, nf))
    for lo in range(0, nf, _RESIDUAL_BLOCK):
        sl = slice(lo, min(lo + _RESIDUAL_BLOCK, nf))
        ok = live[:, sl]
        w = np.where(ok, weight[:, sl], 0.0)
        x = np.where(ok, cross[:, sl], 1.0)
        h = x / np.abs(x)
        err = np.where(ok, np.abs(z[a, sl] * np.conj(z[b, sl]) - h) ** 2, 0.0)
        sw = w.sum(axis=0)
        total[sl] = np.where(sw > 0, (w * err).sum(axis=0) / np.where(sw > 0, sw, 1.0), 0.0)
        num, den = incidence @ (w * err), incidence @ w
        station[:, sl] = np.where(den > 0, num / np.where(den > 0, den, 1.0), 0.0)
    return total, station


# --------------------------------------------------------------------------- entry points


def phase_sync(
    pairs: np.ndarray,
    cross: np.ndarray,
    weight: np.ndarray,
    *,
    n_stations: int,
    method: str = "laplacian",
    columns: slice | np.ndarray | None = None,
    eigen_tol: float = 1e-10,
    eigen_maxiter: int | None = None,
    initial: np.ndarray | None = None,
) -> PhaseSolution:
    """Unit phases ``z_j(f)`` with ``z_j conj(z_k) ~ X_jk / |X_jk|`` (module notes).

    pairs: int [m, 2] station indices (a != b); cross: complex [m, n_freq] cross sums
    ``X_ab ~ R_a conj(R_b)``; weight: float [m, n_freq] (or [m], the same at every
    frequency), pairs with weight <= 0 are left out. ``columns`` (a slice or int array
    into the frequency axis) solves only those frequencies, for mapping blocks of
    frequencies over workers; components are taken over all columns so blocks agree.
    ``initial`` (complex [n_stations, n_freq], all frequencies; rows past an
    earlier solution's stations zero) warm-starts the ``"eigen"`` iterations
    from an earlier solution; the ``"laplacian"`` solve is direct and exact,
    so it needs none and ignores it.
    Returns a :class:`PhaseSolution` with ``z`` complex128 [n_stations, n_selected].
    """
    if method not in METHODS:
        raise ConfigError(f"method = {method!r}: expected one of {', '.join(METHODS)}")
    n = int(n_stations)
    if n < 0:
        raise ConfigError(f"n_stations = {n_stations}: expected a count >= 0")
    pairs, cross, weight = _check_inputs(pairs, cross, weight, n)
    if initial is not None:
        initial = np.asarray(initial, np.complex128)
        if initial.shape != (n, cross.shape[1]):
            raise ConfigError(f"initial has shape {initial.shape}: expected (n_stations, n_freq) = "
                              f"({n}, {cross.shape[1]})")
    cols = np.arange(cross.shape[1])[slice(None) if columns is None else columns]
    cols = np.atleast_1d(cols).astype(np.int64)
    live_all = _usable(cross, weight)
    union = live_all.any(axis=1)
    has = np.zeros(n, bool)
    has[pairs[union, 0]] = has[pairs[union, 1]] = True
    component, n_components = component_labels(n, pairs[union, 0], pairs[union, 1], has)
    cx, wx, live = cross[:, cols], weight[:, cols], live_all[:, cols]
    z = np.ones((n, len(cols)), np.complex128)
    per_freq = np.zeros(len(cols), np.int64)
    cache: dict[bytes, _Structure] = {}
    for i, col in enumerate(cols):
        key = np.packbits(live[:, i]).tobytes()
        st = cache.get(key)
        if st is None:
            st = cache[key] = _structure(pairs, live[:, i], n)
        per_freq[i] = st.n_components
        x = cx[st.edges, i]
        w = wx[st.edges, i]
        hw = w * x / np.abs(x)
        if method == "laplacian":
            zi = _laplacian(st, hw, w, n)
        else:
            start = None if initial is None else initial[:, col]
            zi = _eigen(st, pairs, hw, w, n, eigen_tol, eigen_maxiter, int(col), start)
        z[:, i] = _normalise_and_gauge(zi, st.labels, st.n_components, int(col))
    residual, station_residual = _residuals(pairs, cx, wx, live, z)
    return PhaseSolution(z=z, component=component, n_components=n_components, residual=residual,
                         station_residual=station_residual, isolated=~has, frequency_components=per_freq,
                         columns=cols, method=method)


def concat_phase_solutions(parts: list[PhaseSolution]) -> PhaseSolution:
    """Join solutions of frequency blocks of the same pairs along the frequency axis
    (in the order given). The blocks must agree on components (they do when each was
    solved with ``columns=`` on the same inputs)."""
    if not parts:
        raise ConfigError("concat_phase_solutions: got no parts; expected at least one PhaseSolution")
    first = parts[0]
    for p in parts[1:]:
        if p.z.shape[0] != first.z.shape[0] or not np.array_equal(p.component, first.component) \
                or p.method != first.method:
            raise ConfigError("concat_phase_solutions: parts differ in stations, components or method; "
                              "solve every block from the same pairs, cross and weight with columns=")
    return PhaseSolution(
        z=np.concatenate([p.z for p in parts], axis=1), component=first.component,
        n_components=first.n_components, residual=np.concatenate([p.residual for p in parts]),
        station_residual=np.concatenate([p.station_residual for p in parts], axis=1), isolated=first.isolated,
        frequency_components=np.concatenate([p.frequency_components for p in parts]),
        columns=np.concatenate([p.columns for p in parts]), method=first.method,
    )
