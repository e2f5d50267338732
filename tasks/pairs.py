"""Station pairs and their cross-spectral sums (pure numpy / scipy).

The station graph
-----------------
Neighbour pairs join stations within a radius (:func:`neighbour_pairs`).
Stations are rows of the survey's append-only station tables, so adding
stations never changes the pairs among earlier ones. A graph that falls
apart (pairs only along lines when the radius is below the line spacing)
leaves one phase and amplitude gauge per component: :func:`graph_components`
finds them and :func:`bridge_components` adds the nearest cross pairs along
a minimum spanning tree of the components.

Pair sums
---------
For receivers ``j < k`` recorded by one shot ``i`` (:func:`receiver_pair_sums`):

    cross_jk = sum_i D_ij conj(D_ik),  power_a = sum_i |D_ij|^2,
    power_b = sum_i |D_ik|^2,          count = number of shots,

and for source stations ``i < l`` at one receiver ``j``
(:func:`source_pair_sums`): ``cross_il = sum_j D_ij conj(D_lj)`` and so on.
Products are of complex64 spectra in complex128, so each is exact to one
float64 rounding; sums run over the common shots (receivers) in increasing
shot id (receiver index) order, so a reordered input gives bit-identical
sums. Only pairs with at least one product appear (rows sorted), so partial
sums over disjoint shots (for receiver pairs) or disjoint receivers (for
source pairs) add with :meth:`PairSums.__add__ <descatter.tasks.statistics.PairSums.__add__>`
to the sums over all, to rounding.

Duplicates: when two live traces share (shot, receiver) for receiver pairs,
or (receiver, source station) for source pairs, only the first in input
order is used (the convention of the ``duplicate`` trace-QC flag, which
leaves the first occurrence unflagged).

Swaths: a shot belongs to one swath, so receiver-pair sums of swaths simply
add. Source pairs join traces of different swaths at a common receiver;
with per-swath sums ``W_a = source_pair_sums(swath a)`` and cross-swath sums
``B_ab = source_pair_sums_between(swath a, swath b)`` (only products of a
trace of ``a`` with a trace of ``b``), the survey's sums are
``sum_a W_a + sum_{a<b} B_ab`` with nothing counted twice, provided no
(source station, receiver) is recorded in two swaths. ``B_ab`` is zero unless
some source of ``a`` is within the radius of some source of ``b``
(neighbouring source lines).
"""

from __future__ import annotations

import numpy as np
from scipy.sparse import coo_matrix, csr_matrix
from scipy.sparse.csgraph import connected_components, minimum_spanning_tree
from scipy.spatial import Delaunay, QhullError, cKDTree

from .errors import ConfigError, GeometryError
from .statistics import PairSums

# --------------------------------------------------------------------------- the station graph


def _points(x, y) -> np.ndarray:
    pts = np.column_stack([np.asarray(x, np.float64).ravel(), np.asarray(y, np.float64).ravel()])
    if not np.all(np.isfinite(pts)):
        bad = int(np.flatnonzero(~np.isfinite(pts).all(axis=1))[0])
        raise GeometryError(f"station {bad} has a non-finite coordinate; fix the station table before pairing")
    return pts


def _sorted_rows(pairs: np.ndarray) -> np.ndarray:
    pairs = np.asarray(pairs, dtype=np.int64).reshape(-1, 2)
    return pairs[np.lexsort((pairs[:, 1], pairs[:, 0]))]


def neighbour_pairs(x, y, *, radius_m: float) -> np.ndarray:
    """Station pairs within ``radius_m`` of each other.

    x, y: float [n] station coordinates (m). Returns int64 [n_pairs, 2],
    rows ``(a, b)`` with ``a < b`` and ``hypot(x_a - x_b, y_a - y_b) <=
    radius_m``, sorted lexicographically (scipy.spatial.cKDTree.query_pairs).
    """
    if not (np.isfinite(radius_m) and radius_m >= 0):
        raise ConfigError(f"radius_m = {radius_m}: expected a pair radius >= 0 in metres")
    pts = _points(x, y)
    if len(pts) < 2:
        return np.zeros((0, 2), np.int64)
    return _sorted_rows(cKDTree(pts).query_pairs(float(radius_m), output_type="ndarray"))


def _check_pairs(pairs, n_stations: int | None = None) -> np.ndarray:
    p = np.asarray(pairs, dtype=np.int64).reshape(-1, 2)
    if p.size and p.min() < 0:
        raise ConfigError(f"pairs: got a negative station index {int(p.min())}; expected station-table rows")
    if n_stations is not None and p.size and p.max() >= n_stations:
        raise ConfigError(f"pairs: station index {int(p.max())} is beyond the {n_stations} stations")
    return p


def graph_components(n_stations: int, pairs) -> tuple[int, np.ndarray]:
    """Connected components of the station graph.

    pairs: int [n_pairs, 2] station indices < n_stations. Returns
    ``(n_components, labels)``, labels int64 [n_stations] numbered in order
    of each component's smallest station index (a station without pairs is
    a component of its own). scipy.sparse.csgraph.connected_components.
    """
    n = int(n_stations)
    p = _check_pairs(pairs, n)
    if n == 0:
        return 0, np.zeros(0, np.int64)
    graph = coo_matrix((np.ones(len(p), np.int8), (p[:, 0], p[:, 1])), shape=(n, n))
    count, labels = connected_components(graph, directed=False)
    _, first = np.unique(labels, return_index=True)
    rank = np.empty(count, np.int64)
    rank[np.argsort(first, kind="stable")] = np.arange(count)
    return int(count), rank[labels]


def _delaunay_candidates(pts: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Station pairs that hold every edge of the Euclidean minimum spanning
    tree between any groups of stations: zero-length pairs of coincident
    stations plus the Delaunay edges of the distinct positions. (The
    nearest pair across any split of the stations has an empty diametral
    circle, so it is a Gabriel, hence Delaunay, edge.) Two int64 [m] arrays."""
    uniq, first, inverse = np.unique(pts, axis=0, return_index=True, return_inverse=True)
    inverse = inverse.reshape(-1)
    order = np.argsort(inverse, kind="stable")
    same = inverse[order][1:] == inverse[order][:-1]
    zero = np.column_stack([order[:-1][same], order[1:][same]])
    if len(uniq) < 2:
        edges = np.zeros((0, 2), np.int64)
    elif len(uniq) == 2:
        edges = np.array([[0, 1]])
    else:
        centred = uniq - uniq.mean(axis=0)
        if np.linalg.matrix_rank(centred, tol=1e-9 * max(np.abs(centred).max(), 1.0)) < 2:
            # collinear: the spanning tree runs between consecutive positions along the line
            direction = np.linalg.svd(centred, full_matrices=False)[2][0]
            along = np.argsort(centred @ direction, kind="stable")
            edges = np.column_stack([along[:-1], along[1:]])
        else:
            try:
                tri = Delaunay(uniq)
            except QhullError:
                tri = Delaunay(uniq, qhull_options="QJ")
            s = tri.simplices
            edges = np.concatenate([s[:, [0, 1]], s[:, [1, 2]], s[:, [0, 2]]])
    edges = np.concatenate([zero.astype(np.int64), first[np.asarray(edges, np.int64)].reshape(-1, 2)])
    return edges[:, 0], edges[:, 1]


def _tree_over_components(pts, labels, n_comp, a, b):
    """Kruskal's tree of the component graph over candidate station pairs (a, b):
    component pairs (low, high) int64 [t] each and their distances float64 [t]."""
    la, lb = labels[a], labels[b]
    cross = la != lb
    ca, cb = np.minimum(la, lb)[cross], np.maximum(la, lb)[cross]
    dist = np.hypot(*(pts[a[cross]] - pts[b[cross]]).T)
    key = ca * n_comp + cb
    order = np.lexsort((dist, key))
    head = np.ones(len(order), bool)
    head[1:] = key[order][1:] != key[order][:-1]
    best = order[head]  # the shortest candidate of each component pair, sorted by key
    # +1 on every weight: zero-length edges stay edges, and a constant does not change the tree
    graph = coo_matrix((dist[best] + 1.0, (ca[best], cb[best])), shape=(n_comp, n_comp))
    tree = minimum_spanning_tree(graph).tocoo()
    ta = np.minimum(tree.row, tree.col).astype(np.int64)
    tb = np.maximum(tree.row, tree.col).astype(np.int64)
    return ta, tb, dist[best][np.searchsorted(key[best], ta * n_comp + tb)]


def _component_tree(pts: np.ndarray, labels: np.ndarray, n_comp: int):
    """Minimum spanning tree of the components, edge length = smallest station distance.

    First over the cross-component pairs among each station's 16 nearest
    neighbours (cKDTree): a pair left out is at least as long as the
    shorter of its two stations' 16th-neighbour distances, so when the tree
    spans and its longest edge is no longer than every such distance, no
    left-out pair could shorten it. Otherwise over the Delaunay candidates,
    which always hold the tree."""
    n = len(pts)
    k = min(16, n - 1)
    if k >= 1:
        dist, nbr = cKDTree(pts).query(pts, k=k + 1)
        a = np.repeat(np.arange(n, dtype=np.int64), k)
        ta, tb, td = _tree_over_components(pts, labels, n_comp, a, nbr[:, 1:].ravel().astype(np.int64))
        if len(ta) == n_comp - 1 and (k == n - 1 or td.max() <= dist[:, k].min()):
            return ta, tb, td
    return _tree_over_components(pts, labels, n_comp, *_delaunay_candidates(pts))


def bridge_components(x, y, pairs, *, per_bridge: int = 3, max_distance_m: float | None = None):
    """Nearest station pairs that connect the components of the station graph.

    x, y: float [n] station coordinates (m); pairs: int [n_pairs, 2] the
    graph's pairs. The components (:func:`graph_components`) are joined
    along the minimum spanning tree of the component graph, whose edge
    length between two components is their smallest station distance
    (Kruskal's tree over candidate pairs from nearest-neighbour queries, or
    from a Delaunay triangulation where those cannot prove the tree:
    O(n log n) either way, :func:`_component_tree`). For each tree edge the ``per_bridge`` nearest station pairs
    between its two components are added (cKDTree queries of the smaller
    component against the larger); edges longer than ``max_distance_m``
    (None: no limit) are not bridged and those components stay apart.

    Returns ``(extra_pairs, report)``: extra_pairs int64 [m, 2], rows
    ``(a, b)``, ``a < b``, sorted, none already in ``pairs``; report: one
    dict per tree edge, shortest first: ``component_a``, ``component_b``
    (labels of :func:`graph_components` on ``pairs``), ``stations_a``,
    ``stations_b`` (their sizes), ``distance_m`` (smallest station
    distance), ``max_pair_distance_m`` (longest added pair, NaN if none),
    ``n_pairs`` (added), ``bridged`` (False when beyond ``max_distance_m``).
    Pass only the stations that have data: a bridge between stations no shot
    records in common adds nothing to the sums.
    """
    if int(per_bridge) < 1:
        raise ConfigError(f"per_bridge = {per_bridge}: expected at least 1 pair per bridge")
    per_bridge = int(per_bridge)
    pts = _points(x, y)
    n = len(pts)
    pairs = _check_pairs(pairs, n)
    n_comp, labels = graph_components(n, pairs)
    empty = np.zeros((0, 2), np.int64)
    if n_comp <= 1:
        return empty, []
    tree_a, tree_b, tree_d = _component_tree(pts, labels, n_comp)
    sizes = np.bincount(labels, minlength=n_comp)
    limit = np.inf if max_distance_m is None else float(max_distance_m) * (1 + 1e-12)
    bridged = tree_d <= limit

    members = np.argsort(labels, kind="stable")
    starts = np.concatenate([[0], np.cumsum(sizes)])
    edge_rows, found_a, found_b, found_d = [], [], [], []
    edges = np.flatnonzero(bridged)
    big = np.where(sizes[tree_a[edges]] >= sizes[tree_b[edges]], tree_a[edges], tree_b[edges])
    small = np.where(big == tree_a[edges], tree_b[edges], tree_a[edges])
    for comp in np.unique(big):
        sel = np.flatnonzero(big == comp)
        inside = members[starts[comp]:starts[comp + 1]]
        tree_big = cKDTree(pts[inside])
        counts = sizes[small[sel]]
        owner = np.repeat(sel, counts)
        offsets = np.repeat(starts[small[sel]] - np.concatenate([[0], np.cumsum(counts)[:-1]]), counts)
        queried = members[np.arange(counts.sum()) + offsets]
        k = min(per_bridge, len(inside))
        d, j = tree_big.query(pts[queried], k=k)
        d, j = d.reshape(len(queried), k), j.reshape(len(queried), k)
        edge_rows.append(np.repeat(edges[owner], k))
        found_a.append(np.repeat(queried, k))
        found_b.append(inside[j.ravel()])
        found_d.append(d.ravel())
    report = []
    extra = empty
    if edge_rows:
        e = np.concatenate(edge_rows)
        a, b, d = np.concatenate(found_a), np.concatenate(found_b), np.concatenate(found_d)
        a, b = np.minimum(a, b), np.maximum(a, b)
        order = np.lexsort((b, a, d, e))
        e, a, b, d = e[order], a[order], b[order], d[order]
        first = np.searchsorted(e, e, side="left")
        take = (np.arange(len(e)) - first < per_bridge) & (d <= limit)
        e, a, b, d = e[take], a[take], b[take], d[take]
        extra = np.unique(np.column_stack([a, b]), axis=0).astype(np.int64)
    else:
        e = d = np.zeros(0)
    n_added = np.bincount(e.astype(np.int64), minlength=len(tree_d)) if len(e) else np.zeros(len(tree_d), np.int64)
    longest = np.full(len(tree_d), np.nan)
    if len(e):
        np.fmax.at(longest, e.astype(np.int64), d)
    for t in np.lexsort((tree_b, tree_a, tree_d)):
        report.append({
            "component_a": int(tree_a[t]), "component_b": int(tree_b[t]),
            "stations_a": int(sizes[tree_a[t]]), "stations_b": int(sizes[tree_b[t]]),
            "distance_m": float(tree_d[t]), "max_pair_distance_m": float(longest[t]),
            "n_pairs": int(n_added[t]), "bridged": bool(bridged[t]),
        })
    return extra, report


# --------------------------------------------------------------------------- pair sums


def _normalised_pairs(pairs) -> np.ndarray:
    p = _check_pairs(pairs)
    if np.any(p[:, 0] == p[:, 1]):
        bad = p[p[:, 0] == p[:, 1]][0]
        raise ConfigError(f"pairs: got the self pair {bad.tolist()}; a pair joins two different stations")
    if len(p) == 0:
        return np.zeros((0, 2), np.int64)
    low, high = np.minimum(p[:, 0], p[:, 1]), np.maximum(p[:, 0], p[:, 1])
    span = np.int64(high.max()) + 1
    key = low * span + high
    if np.all(key[1:] > key[:-1]):  # already sorted and unique, as neighbour_pairs gives them
        return np.column_stack([low, high])
    key = np.unique(key)
    return np.column_stack([key // span, key % span])


def _check_spectra(spectra, n_arrays: dict) -> tuple[np.ndarray, int]:
    s = np.asarray(spectra)
    if s.ndim != 2:
        raise ConfigError(f"spectra: got shape {s.shape}; expected [n_traces, n_freq]")
    n = s.shape[0]
    for name, a in n_arrays.items():
        if a is not None and np.asarray(a).size != n:
            raise ConfigError(f"{name}: got {np.asarray(a).size} values for {n} traces; expected one per trace")
    return s, n


class _Traces:
    """Live traces of one side keyed by (group, station), duplicates dropped
    (first in input order kept), sorted by key."""

    def __init__(self, group_rank: np.ndarray, station: np.ndarray, trace: np.ndarray, n_station: int):
        key = group_rank * n_station + station
        order = np.argsort(key, kind="stable")
        key = key[order]
        first = np.ones(len(key), bool)
        first[1:] = key[1:] != key[:-1]
        self.key = key[first]
        self.trace = trace[order][first]
        self.group = group_rank[order][first]
        self.station = station[order][first]


def _matches(a: _Traces, b: _Traces, pairs: np.ndarray, n_station: int):
    """Every (pair p, trace of a at pairs[p, 0], trace of b at pairs[p, 1]) in one group."""
    lo = np.searchsorted(pairs[:, 0], a.station, side="left")
    hi = np.searchsorted(pairs[:, 0], a.station, side="right")
    deg = hi - lo
    total = int(deg.sum())
    owner = np.repeat(np.arange(len(deg)), deg)
    p = np.arange(total) - np.repeat(np.cumsum(deg) - deg, deg) + lo[owner]
    want = a.group[owner] * n_station + pairs[p, 1]
    pos = np.searchsorted(b.key, want)
    hit = pos < len(b.key)
    hit[hit] = b.key[pos[hit]] == want[hit]
    return p[hit], a.trace[owner[hit]], b.trace[pos[hit]], a.group[owner[hit]]


# Products per block of the cross-spectral sum: the block's complex128
# temporaries stay in cache (about 1 MB at 200 frequencies).
_BLOCK_PRODUCTS = 512


def _segment_matrix(segment: np.ndarray, columns: np.ndarray, n_rows: int, n_cols: int) -> csr_matrix:
    """0/1 CSR matrix with a one at (segment[m], columns[m]); ``segment`` sorted,
    entries of a row kept in input order (the order of the sums)."""
    indptr = np.searchsorted(segment, np.arange(n_rows + 1))
    return csr_matrix((np.ones(len(segment)), columns, indptr), shape=(n_rows, n_cols))


def _accumulate(spectra: np.ndarray, pairs: np.ndarray, p, ta, tb, g, tie) -> PairSums:
    """Sum the products of the matched traces per pair, in increasing group order.

    The k-th product of every pair (its rank) is added in the k-th sweep,
    so each sum runs in group order without a per-pair loop: sweep 0
    writes the first product of every pair, later sweeps add theirs."""
    n_freq = spectra.shape[1]
    if len(p) == 0:
        return PairSums.empty(n_freq)
    order = np.lexsort((tie, g, p))  # within a pair: increasing group, a fixed summation order
    p, ta, tb = p[order], ta[order], tb[order]
    head = np.concatenate([[True], p[1:] != p[:-1]])
    first = np.flatnonzero(head)
    segment = np.cumsum(head) - 1  # output row of each product
    rank = np.arange(len(p)) - first[segment]
    n_out = len(first)
    # products in the spectra's own precision (complex64 from windowed_spectra), sums in complex128
    d = np.ascontiguousarray(spectra)
    if d.dtype != np.complex64:
        d = d.astype(np.complex128)
    d_conj = np.conjugate(d)
    cross = np.empty((n_out, n_freq), np.complex128)
    later = np.flatnonzero(rank > 0)
    later = later[np.lexsort((segment[later], rank[later]))]
    sweeps = np.split(later, np.flatnonzero(np.diff(rank[later])) + 1) if len(later) else []
    for sweep, rows in enumerate([first, *sweeps]):
        for s in range(0, len(rows), _BLOCK_PRODUCTS):
            m = rows[s : s + _BLOCK_PRODUCTS]
            prod = d_conj.take(tb[m], axis=0)
            prod *= d.take(ta[m], axis=0)
            rows_m = segment[m]
            if sweep == 0:
                cross[s : s + len(m)] = prod  # first[k] is the first product of row k
            elif rows_m[-1] - rows_m[0] == len(m) - 1:
                cross[rows_m[0] : rows_m[-1] + 1] += prod  # consecutive rows (every pair has this rank)
            else:
                cross[rows_m] += prod  # one product per row in a sweep: no index repeats
    power = d.real**2 + d.imag**2
    return PairSums(
        pairs=pairs[p[first]].copy(),
        cross=cross,
        power_a=np.asarray(_segment_matrix(segment, ta, n_out, len(d)) @ power),
        power_b=np.asarray(_segment_matrix(segment, tb, n_out, len(d)) @ power),
        count=np.diff(np.append(first, len(p))).astype(np.int64),
    )


def _side(group, station, live, n):
    group = np.asarray(group, np.int64).ravel()
    station = np.asarray(station, np.int64).ravel()
    live = np.ones(n, bool) if live is None else np.asarray(live, bool).ravel()
    if station.size and station[live].size and station[live].min() < 0:
        raise ConfigError("station indices must be >= 0 (rows of the station table)")
    return group[live], station[live], np.flatnonzero(live)


def _pair_sums(sides, pairs, *, between: bool) -> PairSums:
    """sides: [(spectra, group, station, live)] one (within) or two (between)."""
    pairs = _normalised_pairs(pairs)
    spectra = np.concatenate([np.asarray(s[0]) for s in sides]) if len(sides) > 1 else np.asarray(sides[0][0])
    n_freq = spectra.shape[1]
    parts, base = [], 0
    for s, group, station, live in sides:
        g, st, tr = _side(group, station, live, len(s))
        parts.append((g, st, tr + base))
        base += len(s)
    if len(pairs) == 0 or sum(len(pt[0]) for pt in parts) == 0:
        return PairSums.empty(n_freq)
    n_station = int(max(pairs.max(), *(pt[1].max(initial=0) for pt in parts))) + 1
    groups, inverse = np.unique(np.concatenate([pt[0] for pt in parts]), return_inverse=True)
    ranks = np.split(inverse.reshape(-1), np.cumsum([len(pt[0]) for pt in parts])[:-1])
    if len(groups) * n_station >= 2**62:
        raise ConfigError(f"{len(groups)} groups x {n_station} stations overflow the join key; pass fewer traces per call")
    tables = [_Traces(r, pt[1], pt[2], n_station) for r, pt in zip(ranks, parts)]
    if not between:
        p, ta, tb, g = _matches(tables[0], tables[0], pairs, n_station)
        return _accumulate(spectra, pairs, p, ta, tb, g, np.zeros(len(p), np.int64))
    ab = _matches(tables[0], tables[1], pairs, n_station)
    ba = _matches(tables[1], tables[0], pairs, n_station)
    p, ta, tb, g = (np.concatenate([x, y]) for x, y in zip(ab, ba))
    tie = np.concatenate([np.zeros(len(ab[0]), np.int64), np.ones(len(ba[0]), np.int64)])
    return _accumulate(spectra, pairs, p, ta, tb, g, tie)


def receiver_pair_sums(spectra, *, shot, receiver, pairs, live=None) -> PairSums:
    """Cross-spectral sums of receiver pairs over the shots that record both.

    spectra complex64 [n, n_freq] (:func:`~descatter.tasks.spectra.windowed_spectra`);
    shot int64 [n] shot id per trace (any order; shots may be spread over
    the input); receiver int64 [n] receiver-table row; pairs int [n_pairs, 2]
    the allowed receiver pairs (:func:`neighbour_pairs`, any order, each
    row ``(a, b)`` or ``(b, a)``); live bool [n] or None (all live).

    Returns :class:`~descatter.tasks.statistics.PairSums` over the allowed
    pairs recorded live by at least one common shot, rows ``(j, k)``,
    ``j < k``, sorted: ``cross = sum_i D_ij conj(D_ik)``, ``power_a = sum_i
    |D_ij|^2``, ``power_b = sum_i |D_ik|^2``, ``count`` = shots (module
    notes: duplicates, order, additivity). The join is vectorised: traces
    sorted by the key ``shot rank * n_stations + receiver``, each trace's
    partners found by ``searchsorted``.
    """
    s, n = _check_spectra(spectra, {"shot": shot, "receiver": receiver, "live": live})
    return _pair_sums([(s, shot, receiver, live)], pairs, between=False)


def source_pair_sums(spectra, *, shot_source, receiver, pairs, live=None) -> PairSums:
    """Cross-spectral sums of source-station pairs over their common receivers.

    spectra complex64 [n, n_freq]; shot_source int64 [n] source-table row of
    each trace's shot; receiver int64 [n] receiver-table row; pairs int
    [n_pairs, 2] allowed source-station pairs; live bool [n] or None.
    Returns PairSums with rows ``(i, l)``, ``i < l``: ``cross = sum_j D_ij
    conj(D_lj)``, ``power_a = sum_j |D_ij|^2``, ``power_b = sum_j |D_lj|^2``,
    ``count`` = common receivers. Partial sums over disjoint sets of
    receivers add; for swaths see the module notes and
    :func:`source_pair_sums_between`.
    """
    s, n = _check_spectra(spectra, {"shot_source": shot_source, "receiver": receiver, "live": live})
    return _pair_sums([(s, receiver, shot_source, live)], pairs, between=False)


def source_pair_sums_between(spectra_a, spectra_b, *, shot_source_a, receiver_a, shot_source_b, receiver_b,
                             pairs, live_a=None, live_b=None) -> PairSums:
    """Source-pair sums of the products of a trace of set A with a trace of set B.

    Arguments as in :func:`source_pair_sums`, once for each set (for
    example two swaths). Every product ``D_ij conj(D_lj)`` at a common
    receiver ``j`` with one trace from A and the other from B counts once
    (row ``(i, l)``, ``i < l``, whichever set holds ``i``); products within
    A or within B do not. So ``source_pair_sums(A) + source_pair_sums(B) +
    source_pair_sums_between(A, B)`` equals ``source_pair_sums`` of A and B
    together (to rounding) when no (source station, receiver) is in both.
    """
    sa, _ = _check_spectra(spectra_a, {"shot_source_a": shot_source_a, "receiver_a": receiver_a, "live_a": live_a})
    sb, _ = _check_spectra(spectra_b, {"shot_source_b": shot_source_b, "receiver_b": receiver_b, "live_b": live_b})
    if sa.shape[1] != sb.shape[1]:
        raise ConfigError(f"spectra_a has {sa.shape[1]} frequencies and spectra_b {sb.shape[1]}; expected the same band")
    return _pair_sums([(sa, receiver_a, shot_source_a, live_a), (sb, receiver_b, shot_source_b, live_b)],
                      pairs, between=True)


# --------------------------------------------------------------------------- smoothing over frequency


def smooth_over_frequency(values, *, bin_hz: float, half_width_hz: float) -> np.ndarray:
    """Triangular running mean along the last (frequency) axis, symmetric at every bin.

    values float or complex [..., n_freq] on bins ``bin_hz`` apart. Output bin ``m`` is
    ``sum_k w_k x[m + k] / sum_k w_k`` with ``w_k = 1 - |k| bin_hz / half_width_hz`` for
    ``|k| < half_width_hz / bin_hz`` and ``|k| <= min(m, n_freq - 1 - m)``: near the band
    edges the kernel shrinks symmetrically (the edge bins are kept as they are), so a
    linear phase ``exp(-2 pi i f tau)`` keeps its slope at every bin (a one-sided kernel
    would bend it and move the statics). ``half_width_hz <= bin_hz`` returns a copy.
    Linear, so it commutes with the sums over shots and swaths.

    Why: windows much longer than the station filters give spectra finer than the
    filters need, and each bin of a pair sum carries its own noise. In time the
    triangle is the lag window ``sinc^2(half_width_hz * lag)`` on the pair
    cross-correlations (0.5 at about 0.44 / half_width_hz), which keeps the lags of
    the relative station filters and drops the noise at longer lags.
    Returns an array of the input's dtype (float64 or complex128) and shape.
    """
    x = np.asarray(values)
    x = x.astype(np.complex128 if np.iscomplexobj(x) else np.float64, copy=True)
    if not (np.isfinite(bin_hz) and bin_hz > 0 and np.isfinite(half_width_hz) and half_width_hz >= 0):
        raise ConfigError(f"bin_hz = {bin_hz}, half_width_hz = {half_width_hz}: expected a bin spacing > 0 "
                          "and a smoothing half-width >= 0 in Hz")
    n = x.shape[-1]
    reach = int(np.ceil(half_width_hz / bin_hz)) - 1  # the last lag with a positive weight
    if reach < 1 or n < 3:
        return x
    m = np.arange(n)
    room = np.minimum(m, n - 1 - m)
    total = x.copy()
    norm = np.ones(n)
    for k in range(1, reach + 1):
        w = np.where(room >= k, 1.0 - k * bin_hz / half_width_hz, 0.0)
        # in place on slices: x[m - k] reaches bins m >= k, x[m + k] bins m < n - k
        # (a zero-padded shifted copy of each side cost 2.5x the time)
        total[..., k:] += w[k:] * x[..., :-k]
        total[..., :-k] += w[:-k] * x[..., k:]
        norm += 2 * w
    total /= norm
    return total


def smooth_pair_sums(sums: PairSums, *, bin_hz: float, half_width_hz: float) -> PairSums:
    """The pair sums with ``cross``, ``power_a`` and ``power_b`` smoothed over frequency by
    :func:`smooth_over_frequency` (pairs and counts unchanged): the coherence of the result
    is that of band-averaged spectra."""
    return PairSums(sums.pairs, smooth_over_frequency(sums.cross, bin_hz=bin_hz, half_width_hz=half_width_hz),
                    smooth_over_frequency(sums.power_a, bin_hz=bin_hz, half_width_hz=half_width_hz),
                    smooth_over_frequency(sums.power_b, bin_hz=bin_hz, half_width_hz=half_width_hz),
                    sums.count)
