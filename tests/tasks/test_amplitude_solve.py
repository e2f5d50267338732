"""Surface-consistent log-spectral decomposition against an explicit design matrix.

References: scipy.sparse.linalg.lsqr (Paige & Saunders 1982) on the explicit
trace-by-term 0/1 design matrix, scipy.linalg.null_space for the null space,
and the decomposition L_ij = s_i + r_j + o_h (+ c_m) of Taner & Koehler (1981)
and Cary & Lorentz (1993) on noise-free synthetic log amplitudes.
"""

from __future__ import annotations

import logging

import numpy as np
import pytest
import scipy.sparse as sp
from scipy.linalg import null_space
from scipy.sparse.csgraph import connected_components
from scipy.sparse.linalg import lsqr

from descatter.tasks import amplitude_solve as amplitude_module
from descatter.tasks.amplitude_solve import (AUTO_MAX_COUPLINGS, AUTO_MAX_DENSE, _active_matrix, _auto_method,
                                             _dense_unknowns, _normal_equations, amplitude_solve)
from descatter.tasks.errors import ConfigError, GeometryError
from descatter.tasks.statistics import LogPowerSums
from descatter.tasks.synthetic import station_truth, stations, swath_traces, synthetic_spec


# --------------------------------------------------------------------------- simple references


def sums_of(index: dict, sizes: dict, values: np.ndarray) -> LogPowerSums:
    """LogPowerSums by loops over traces (the definition, no shortcuts)."""
    kinds = list(index)
    n_freq = values.shape[1]
    sums = {k: np.zeros((sizes[k], n_freq)) for k in kinds}
    counts = {k: np.zeros(sizes[k], np.int64) for k in kinds}
    pair_count = {(a, b): {} for i, a in enumerate(kinds) for b in kinds[i + 1:]}
    for t in range(len(values)):
        for k in kinds:
            sums[k][index[k][t]] += values[t]
            counts[k][index[k][t]] += 1
        for (a, b), table in pair_count.items():
            key = (int(index[a][t]), int(index[b][t]))
            table[key] = table.get(key, 0) + 1
    cross = {f"{a}|{b}": np.array(sorted((i, j, c) for (i, j), c in table.items()), np.int64).reshape(-1, 3)
             for (a, b), table in pair_count.items()}
    return LogPowerSums(sums, counts, cross, (values**2).sum(axis=0), len(values))


def design(index: dict, sizes: dict, terms) -> np.ndarray:
    """Dense 0/1 design matrix [n_traces, sum of term counts] (small surveys only)."""
    n = len(next(iter(index.values())))
    blocks = []
    for k in terms:
        block = np.zeros((n, sizes[k]))
        block[np.arange(n), index[k]] = 1.0
        blocks.append(block)
    return np.hstack(blocks)


def labels(n: int, a, b) -> np.ndarray:
    g = sp.coo_matrix((np.ones(len(a)), (a, b)), shape=(n, n))
    return connected_components(g, directed=False)[1]


def reference_gauge(x, a_mat, index, sizes, terms):
    """The documented gauge applied to any least-squares solution by adding null vectors
    of the explicit design matrix (found numerically, scipy.linalg.null_space)."""
    off = np.cumsum([0] + [sizes[k] for k in terms])
    part = {k: slice(off[i], off[i + 1]) for i, k in enumerate(terms)}
    used = a_mat.sum(axis=0) > 0
    ns, nr = sizes["source"], sizes["receiver"]
    station = labels(ns + nr, index["source"], ns + index["receiver"])
    n = off[-1]
    rows_a, rows_b = [], []
    for i, p in enumerate(terms):
        for q in terms[i + 1:]:
            rows_a.append(off[i] + index[p]), rows_b.append(off[terms.index(q)] + index[q])
    term = labels(n, np.concatenate(rows_a), np.concatenate(rows_b))
    constraints = []

    def mean_row(kind, members):
        row = np.zeros(n)
        row[np.flatnonzero(members) + off[terms.index(kind)]] = 1.0 / members.sum()
        return row

    s_lab, r_lab = station[:ns], station[ns:]
    for c in np.unique(s_lab[used[part["source"]]]):
        constraints.append(mean_row("source", (s_lab == c) & used[part["source"]]))
    t = {k: term[part[k]] for k in terms}
    comps = np.unique(term[used])
    if "offset" in terms:
        for c in comps:
            constraints.append(mean_row("receiver", (t["receiver"] == c) & used[part["receiver"]]))
    if "cmp" in terms:
        for c in comps:
            constraints.append(mean_row("cmp", (t["cmp"] == c) & used[part["cmp"]]))
    c_mat = np.array(constraints)
    z = null_space(a_mat[:, used])
    z_full = np.zeros((n, z.shape[1]))
    z_full[used] = z
    assert z.shape[1] == len(constraints), "the documented gauge must fix exactly the null space"
    x = np.where(used[:, None], x, 0.0)
    return x - z_full @ np.linalg.solve(c_mat @ z_full, c_mat @ x)


def lsqr_solution(a_mat, values):
    """scipy.sparse.linalg.lsqr (Paige & Saunders 1982) on every column."""
    a = sp.csr_matrix(a_mat)
    return np.stack([lsqr(a, values[:, f], atol=1e-15, btol=1e-15, iter_lim=20_000)[0]
                     for f in range(values.shape[1])], axis=1)


def random_survey(rng, n_src, n_rcv, n_off, n_traces, n_cmp=None):
    index = {"source": rng.integers(0, n_src, n_traces), "receiver": rng.integers(0, n_rcv, n_traces),
             "offset": rng.integers(0, n_off, n_traces)}
    sizes = {"source": n_src, "receiver": n_rcv, "offset": n_off}
    if n_cmp:
        index["cmp"], sizes["cmp"] = rng.integers(0, n_cmp, n_traces), n_cmp
    return index, sizes


def stacked(sol, terms):
    return np.concatenate([sol.term(k) for k in terms], axis=0)


# --------------------------------------------------------------------------- against lsqr


@pytest.mark.parametrize("n_src,n_rcv,n_off,n_traces", [(12, 20, 5, 160), (110, 200, 3, 1500)])
def test_matches_lsqr_on_the_explicit_design_matrix(n_src, n_rcv, n_off, n_traces):
    rng = np.random.default_rng(1)
    index, sizes = random_survey(rng, n_src, n_rcv, n_off, n_traces)
    terms = ("source", "receiver", "offset")
    values = rng.standard_normal((n_traces, 4))
    sums = sums_of(index, sizes, values)
    sol = amplitude_solve(sums)
    a_mat = design(index, sizes, terms)
    ref = reference_gauge(lsqr_solution(a_mat, values), a_mat, index, sizes, terms)  # scipy lsqr
    np.testing.assert_allclose(stacked(sol, terms), ref, atol=1e-8)
    rms = np.sqrt(((a_mat @ ref - values) ** 2).mean(axis=0))
    np.testing.assert_allclose(sol.residual_rms, rms, rtol=1e-7)
    assert sol.n_components == 1 and sol.method == "direct" and sol.converged.all()


def test_large_survey_takes_the_dense_offset_path():
    # the second case above: offset bins coupled to hundreds of stations are eliminated
    # through the dense Schur complement
    rng = np.random.default_rng(1)
    index, sizes = random_survey(rng, 110, 200, 3, 1500)
    normal = sp.csr_matrix(design(index, sizes, ("source", "receiver", "offset")))
    assert _dense_unknowns((normal.T @ normal).tocsr()).sum() == 3


def test_cg_matches_direct_and_warm_start_helps():
    rng = np.random.default_rng(2)
    index, sizes = random_survey(rng, 40, 70, 6, 900)
    sums = sums_of(index, sizes, rng.standard_normal((900, 5)))
    direct = amplitude_solve(sums)
    cg = amplitude_solve(sums, method="cg", tol=1e-12)
    terms = direct.terms
    np.testing.assert_allclose(stacked(cg, terms), stacked(direct, terms), atol=1e-8)
    assert cg.converged.all() and cg.iterations > 5
    again = amplitude_solve(sums, method="cg", tol=1e-12, warm_start=cg)
    assert again.iterations < cg.iterations // 2
    np.testing.assert_allclose(stacked(again, terms), stacked(direct, terms), atol=1e-8)


def test_cmp_term_on_irregular_bins_matches_lsqr():
    rng = np.random.default_rng(3)
    index, sizes = random_survey(rng, 15, 25, 4, 400, n_cmp=30)
    terms = ("source", "receiver", "offset", "cmp")
    values = rng.standard_normal((400, 3))
    sol = amplitude_solve(sums_of(index, sizes, values), terms=terms)
    a_mat = design(index, sizes, terms)
    ref = reference_gauge(lsqr_solution(a_mat, values), a_mat, index, sizes, terms)
    np.testing.assert_allclose(stacked(sol, terms), ref, atol=1e-8)
    np.testing.assert_allclose(sol.cmp.mean(axis=0), 0.0, atol=1e-12)


def test_cmp_term_on_a_regular_line_needs_damping():
    # 2D line, stations every unit, CMP bins of half a unit: s_i + r_j - 2 c_m is an exact
    # null mode for a linear trend (Cary & Lorentz 1993), outside the constant gauge
    src, rcv = np.meshgrid(np.arange(0, 30, 3), np.arange(30), indexing="ij")
    src, rcv = src.ravel(), rcv.ravel()
    index = {"source": src // 3, "receiver": rcv, "offset": np.abs(src - rcv) // 4, "cmp": src + rcv}
    sizes = {"source": 10, "receiver": 30, "offset": int(index["offset"].max()) + 1, "cmp": 59}
    rng = np.random.default_rng(4)
    values = rng.standard_normal((len(src), 2))
    sums = sums_of(index, sizes, values)
    terms = ("source", "receiver", "offset", "cmp")
    with pytest.raises(GeometryError, match="damping"):
        amplitude_solve(sums, terms=terms)
    damped = amplitude_solve(sums, terms=terms, damping=1e-6)
    undamped_fit = amplitude_solve(sums, terms=terms, method="cg", tol=1e-13).residual_rms
    assert np.all(np.isfinite(stacked(damped, terms)))
    np.testing.assert_allclose(damped.residual_rms, undamped_fit, rtol=1e-4)


# --------------------------------------------------------------------------- exact recovery, synthetic survey


def test_exact_recovery_on_noise_free_synthetic_log_amplitudes():
    spec = synthetic_spec(size="tiny", scenario="statics", seed=7)
    tables = stations(spec)
    truth = station_truth(spec, tables)
    geo = [swath_traces(spec, s, tables) for s in range(spec.n_swaths)]
    src = np.concatenate([g.source_index for g in geo]).astype(np.int64)
    rcv = np.concatenate([g.receiver_index for g in geo]).astype(np.int64)
    off = np.floor(np.concatenate([g.offset for g in geo]) / 50.0).astype(np.int64)
    freqs = np.linspace(10, 65, 6)
    # log power terms: 2 x the true log amplitude plus a zero-mean frequency-dependent part
    rng = np.random.default_rng(5)
    s_true = 2 * truth.sources.log_amplitude[:, None] + 0.1 * rng.standard_normal((len(tables.sources), 6))
    r_true = 2 * truth.receivers.log_amplitude[:, None] + 0.1 * rng.standard_normal((len(tables.receivers), 6))
    s_true -= s_true.mean(axis=0)
    r_true -= r_true.mean(axis=0)
    o_true = -0.002 * (np.arange(off.max() + 1)[:, None] * 50.0) * (1 + freqs / 65)  # attenuation with offset
    values = s_true[src] + r_true[rcv] + o_true[off]
    index = {"source": src, "receiver": rcv, "offset": off}
    sizes = {"source": len(tables.sources), "receiver": len(tables.receivers), "offset": int(off.max()) + 1}
    sol = amplitude_solve(sums_of(index, sizes, values))
    # Taner & Koehler (1981): noise-free surface-consistent log amplitudes are recovered exactly
    np.testing.assert_allclose(sol.source, s_true, atol=1e-10)
    np.testing.assert_allclose(sol.receiver, r_true, atol=1e-10)
    np.testing.assert_allclose(sol.offset, o_true, atol=1e-10)
    assert sol.residual_rms.max() < 1e-6  # sum-based residual: limited by cancellation, ~sqrt(eps)
    assert sol.n_components == 1 and not any(e.any() for e in sol.empty.values())


# --------------------------------------------------------------------------- components and empty terms


def test_disconnected_surveys_are_solved_per_component():
    rng = np.random.default_rng(6)
    parts = [random_survey(rng, 8, 12, 3, 120), random_survey(rng, 10, 9, 4, 150)]
    # second survey: its own stations and offset bins, after the first
    index = {k: np.concatenate([parts[0][0][k], parts[1][0][k] + parts[0][1][k]]) for k in parts[0][0]}
    sizes = {k: parts[0][1][k] + parts[1][1][k] for k in parts[0][1]}
    truth = {k: rng.standard_normal((sizes[k], 3)) for k in sizes}
    values = sum(truth[k][index[k]] for k in truth)
    sol = amplitude_solve(sums_of(index, sizes, values))
    assert sol.n_components == 2 and sol.n_station_components == 2
    for kind in ("source", "receiver"):
        comp = sol.component[kind]
        assert set(comp[: parts[0][1][kind]]) == {0} and set(comp[parts[0][1][kind]:]) == {1}
        for c in (0, 1):
            np.testing.assert_allclose(sol.term(kind)[comp == c].mean(axis=0), 0.0, atol=1e-12)
    # each part alone gives the same terms as the joint solve
    for i, (idx, siz) in enumerate(parts):
        alone = amplitude_solve(sums_of(idx, siz, sum(truth[k][idx[k] + (parts[0][1][k] if i else 0)] for k in truth)))
        for kind in ("source", "receiver", "offset"):
            start = parts[0][1][kind] if i else 0
            np.testing.assert_allclose(sol.term(kind)[start: start + siz[kind]], alone.term(kind), atol=1e-10)
    assert sol.residual_rms.max() < 1e-6


def test_station_islands_sharing_offset_bins_keep_their_relative_level():
    rng = np.random.default_rng(7)
    a, _ = random_survey(rng, 6, 8, 3, 80)
    b, _ = random_survey(rng, 5, 7, 3, 70)
    index = {"source": np.concatenate([a["source"], b["source"] + 6]),
             "receiver": np.concatenate([a["receiver"], b["receiver"] + 8]),
             "offset": np.concatenate([a["offset"], b["offset"]])}
    sizes = {"source": 11, "receiver": 15, "offset": 3}
    values = rng.standard_normal((150, 2))
    terms = ("source", "receiver", "offset")
    sol = amplitude_solve(sums_of(index, sizes, values))
    assert sol.n_station_components == 2 and sol.n_components == 1
    a_mat = design(index, sizes, terms)
    ref = reference_gauge(lsqr_solution(a_mat, values), a_mat, index, sizes, terms)
    np.testing.assert_allclose(stacked(sol, terms), ref, atol=1e-8)


def test_stations_without_traces_are_flagged_zero_not_nan():
    rng = np.random.default_rng(8)
    index, sizes = random_survey(rng, 10, 14, 3, 200)
    index["source"] = np.where(index["source"] == 4, 5, index["source"])  # source 4 never fires
    sizes["receiver"] = 16  # receivers 14 and 15 never record
    terms = ("source", "receiver", "offset")
    values = rng.standard_normal((200, 3))
    sol = amplitude_solve(sums_of(index, sizes, values))
    assert np.flatnonzero(sol.empty["source"]).tolist() == [4]
    assert np.flatnonzero(sol.empty["receiver"]).tolist() == [14, 15]
    assert np.all(sol.source[4] == 0) and np.all(sol.receiver[14:] == 0)
    assert sol.component["source"][4] == -1 and sol.station_component["receiver"][15] == -1
    a_mat = design(index, sizes, terms)
    ref = reference_gauge(lsqr_solution(a_mat, values), a_mat, index, sizes, terms)
    np.testing.assert_allclose(stacked(sol, terms), ref, atol=1e-8)


# --------------------------------------------------------------------------- input checks


def test_input_errors_say_what_is_wrong():
    rng = np.random.default_rng(9)
    index, sizes = random_survey(rng, 5, 6, 2, 40)
    sums = sums_of(index, sizes, rng.standard_normal((40, 2)))
    with pytest.raises(ConfigError, match="terms"):
        amplitude_solve(sums, terms=("source", "offset"))
    with pytest.raises(ConfigError, match="method"):
        amplitude_solve(sums, method="qr")
    with pytest.raises(ConfigError, match="damping"):
        amplitude_solve(sums, damping=-1.0)
    with pytest.raises(GeometryError, match="cmp"):
        amplitude_solve(sums, terms=("source", "receiver", "cmp"))
    broken = LogPowerSums(sums.sums, sums.counts, {k: v for k, v in sums.cross.items() if k != "receiver|offset"},
                          sums.sum_sq, sums.n_traces)
    with pytest.raises(GeometryError, match="receiver.*offset"):
        amplitude_solve(broken)
    counts = dict(sums.counts, source=sums.counts["source"] + 1)
    with pytest.raises(GeometryError, match="same traces"):
        amplitude_solve(LogPowerSums(sums.sums, counts, sums.cross, sums.sum_sq, sums.n_traces))
    flipped = dict(sums.cross)
    t = flipped.pop("source|receiver")
    flipped["receiver|source"] = t[:, [1, 0, 2]]
    same = amplitude_solve(LogPowerSums(sums.sums, sums.counts, flipped, sums.sum_sq, sums.n_traces))
    np.testing.assert_allclose(same.source, amplitude_solve(sums).source, atol=1e-12)


# --------------------------------------------------------------------------- method choice, CG robustness


def sums_fast(index: dict, sizes: dict, values: np.ndarray) -> LogPowerSums:
    """The same sums as sums_of, vectorised (sparse 0/1 design blocks, np.unique cross counts)."""
    kinds = list(index)
    n = len(values)
    block = {k: sp.csr_matrix((np.ones(n), (np.arange(n), index[k])), shape=(n, sizes[k])) for k in kinds}
    sums = {k: np.asarray(block[k].T @ values) for k in kinds}
    counts = {k: np.bincount(index[k], minlength=sizes[k]).astype(np.int64) for k in kinds}
    cross = {}
    for i, a in enumerate(kinds):
        for b in kinds[i + 1:]:
            key, c = np.unique(index[a] * sizes[b] + index[b], return_counts=True)
            cross[f"{a}|{b}"] = np.column_stack([key // sizes[b], key % sizes[b], c]).astype(np.int64)
    return LogPowerSums(sums, counts, cross, (values**2).sum(axis=0), n)


def patch(n: int, radius: float, seed: int = 0):
    """A 3D patch: receivers on a square grid (half the stations), sources at random positions,
    every shot recording the receivers within ``radius`` grid steps, offset bins of 2 steps."""
    rng = np.random.default_rng(seed)
    side = int(round(np.sqrt(n / 2)))
    rx, ry = np.divmod(np.arange(side * side), side)
    n_src = n - side * side
    sx, sy = rng.uniform(0, side - 1, n_src), rng.uniform(0, side - 1, n_src)
    dist = np.hypot(sx[:, None] - rx[None], sy[:, None] - ry[None])
    src, rcv = np.nonzero(dist <= radius)
    off = (dist[src, rcv] / 2.0).astype(np.int64)
    index = {"source": src, "receiver": rcv, "offset": off}
    return index, {"source": n_src, "receiver": side * side, "offset": int(off.max()) + 1}


def test_vectorised_sums_equal_the_trace_loop():
    rng = np.random.default_rng(20)
    index, sizes = random_survey(rng, 9, 13, 4, 300)
    values = rng.standard_normal((300, 3))
    a, b = sums_of(index, sizes, values), sums_fast(index, sizes, values)
    for k in index:
        np.testing.assert_allclose(b.sums[k], a.sums[k], atol=1e-12)
        np.testing.assert_array_equal(b.counts[k], a.counts[k])
    assert all(np.array_equal(b.cross[k], a.cross[k]) for k in a.cross)


def test_auto_keeps_the_direct_solve_where_it_is_cheap():
    rng = np.random.default_rng(21)
    sparse_case = random_survey(rng, 110, 200, 3, 1500)  # a few dense offset bins, few couplings
    dense_case = patch(300, radius=24.0)                  # every unknown dense, but fewer than the threshold
    for index, sizes in (sparse_case, dense_case):
        sums = sums_fast(index, sizes, rng.standard_normal((len(index["source"]), 3)))
        auto, direct = amplitude_solve(sums), amplitude_solve(sums, method="direct")
        assert auto.method == "direct" and auto.iterations == 0 and auto.converged.all()
        np.testing.assert_array_equal(stacked(auto, auto.terms), stacked(direct, direct.terms))
        assert auto.relative_residual.max() < 1e-12  # the exact solve of the pinned system solves all of N x = b
    dense = _dense_unknowns(_active_matrix(_normal_equations(sums, ("source", "receiver", "offset"))))
    assert 100 < dense.sum() <= AUTO_MAX_DENSE and dense.mean() > 0.9


def test_auto_takes_cg_on_a_densely_coupled_patch():
    index, sizes = patch(700, radius=24.0)  # shots record most receivers: every unknown dense
    rng = np.random.default_rng(22)
    truth = {k: rng.standard_normal((sizes[k], 3)) for k in sizes}
    clean = sum(truth[k][index[k]] for k in sizes)
    noisy = clean + 0.3 * rng.standard_normal(clean.shape)
    sums = sums_fast(index, sizes, noisy)
    assert _dense_unknowns(_active_matrix(_normal_equations(sums, ("source", "receiver", "offset")))).sum() \
        > AUTO_MAX_DENSE
    auto, direct = amplitude_solve(sums), amplitude_solve(sums, method="direct")
    assert auto.method == "cg" and 0 < auto.iterations < 100 and auto.converged.all()
    assert auto.relative_residual.max() <= 1e-10
    # same gauge and the same least-squares answer as the direct solve, to the CG tolerance
    np.testing.assert_allclose(stacked(auto, auto.terms), stacked(direct, direct.terms), atol=1e-7)
    np.testing.assert_allclose(auto.residual_rms, direct.residual_rms, rtol=1e-8)
    np.testing.assert_allclose(auto.source.mean(axis=0), 0.0, atol=1e-12)
    np.testing.assert_allclose(auto.receiver.mean(axis=0), 0.0, atol=1e-12)
    # Taner & Koehler (1981): noise-free data give back the planted terms (in the gauge)
    exact = amplitude_solve(sums_fast(index, sizes, clean))
    ms, mr = truth["source"].mean(axis=0), truth["receiver"].mean(axis=0)
    assert exact.method == "cg"
    np.testing.assert_allclose(exact.source, truth["source"] - ms, atol=1e-7)
    np.testing.assert_allclose(exact.receiver, truth["receiver"] - mr, atol=1e-7)
    np.testing.assert_allclose(exact.offset, truth["offset"] + ms + mr, atol=1e-7)


def test_auto_takes_cg_where_sparse_unknowns_meet_many_others(monkeypatch):
    index, sizes = patch(2500, radius=5.0)  # ~80 couplings per station, only offset bins dense
    rng = np.random.default_rng(23)
    sums = sums_fast(index, sizes, rng.standard_normal((len(index["source"]), 2)))
    active = _active_matrix(_normal_equations(sums, ("source", "receiver", "offset")))
    assert _dense_unknowns(active).sum() <= 10
    auto, direct = amplitude_solve(sums), amplitude_solve(sums, method="direct")
    assert auto.method == "cg" and auto.iterations > 0 and auto.converged.all()
    np.testing.assert_allclose(stacked(auto, auto.terms), stacked(direct, direct.terms), atol=1e-6)
    # the coupling count decides: with a higher limit the same survey stays direct
    monkeypatch.setattr(amplitude_module, "AUTO_MAX_COUPLINGS", 10 * AUTO_MAX_COUPLINGS)
    assert _auto_method(active) == "direct" and amplitude_solve(sums).method == "direct"


def test_cg_that_stops_short_is_flagged_and_logged(caplog):
    index, sizes = patch(400, radius=24.0)
    rng = np.random.default_rng(24)
    sums = sums_fast(index, sizes, rng.standard_normal((len(index["source"]), 3)))
    with caplog.at_level(logging.WARNING, logger="descatter.tasks.amplitude_solve"):
        ok = amplitude_solve(sums, method="cg")
    assert ok.converged.all() and ok.relative_residual.max() <= 1e-10 and not caplog.records
    with caplog.at_level(logging.WARNING, logger="descatter.tasks.amplitude_solve"):
        short = amplitude_solve(sums, method="cg", maxiter=2)
    assert short.method == "cg" and short.iterations == 2 and not short.converged.any()
    assert np.all(short.relative_residual > 1e-6)
    assert len(caplog.records) == 1 and "did not reach tol" in caplog.records[0].getMessage()
    assert "3 of 3 frequencies" in caplog.records[0].getMessage()


def test_undamped_cg_stops_early_when_the_rhs_leaves_the_range(caplog):
    # N is singular without damping; sums that do not come from one set of traces put part of
    # A^T L in its null space, where no x can reach. CG must stop (breakdown or stagnation)
    # long before maxiter, flag the columns and keep its best iterate, not a diverged one.
    index, sizes = patch(400, radius=24.0)
    rng = np.random.default_rng(25)
    good = sums_fast(index, sizes, rng.standard_normal((len(index["source"]), 2)))
    bad = LogPowerSums({k: v.copy() for k, v in good.sums.items()}, good.counts, good.cross, good.sum_sq,
                       good.n_traces)
    bad.sums["source"][3] += 1.0
    with caplog.at_level(logging.WARNING, logger="descatter.tasks.amplitude_solve"):
        sol = amplitude_solve(bad, method="cg", maxiter=5000)
    assert not sol.converged.any() and sol.iterations < 500 and "did not reach tol" in caplog.text
    assert np.all(np.isfinite(sol.relative_residual)) and sol.relative_residual.max() < 1e-3
    reference = amplitude_solve(good, method="direct")
    assert np.abs(stacked(sol, sol.terms) - stacked(reference, reference.terms)).max() < 0.5
    # a tolerance below rounding cannot be met either: flagged, and the answer is still the right one
    tight = amplitude_solve(good, method="cg", tol=1e-17)
    assert not tight.converged.any() and tight.iterations < 500
    np.testing.assert_allclose(stacked(tight, tight.terms), stacked(reference, reference.terms), atol=1e-9)


# --------------------------------------------------------------------------- from pair cross-spectra


def _triangulated_line(n):
    """Stations along a line, each paired with its next two: triangles, so not bipartite."""
    return np.array([(j, j + d) for j in range(n) for d in (1, 2) if j + d < n])


def test_pair_amplitude_solve_recovers_station_terms_from_consistent_pairs():
    from descatter.tasks.amplitude_solve import pair_amplitude_solve

    rng = np.random.default_rng(8)
    n, n_freq = 12, 5
    r = rng.normal(size=(n, n_freq))
    pairs = _triangulated_line(n)
    level = rng.normal(size=n_freq)  # what the pairs share (source and earth power)
    phase = np.exp(1j * rng.uniform(0, 2 * np.pi, (len(pairs), n_freq)))
    cross = np.exp(0.5 * r[pairs[:, 0]] + 0.5 * r[pairs[:, 1]] + level) * phase
    prior = r + rng.normal(scale=0.5, size=r.shape)
    # a faint prior (damping 1e-8) so the pairs decide to rounding
    got = pair_amplitude_solve(pairs, cross, rng.integers(1, 9, len(pairs)), prior=prior, damping=1e-8)
    # consistent pairs fix every station relative to the others; the level is the prior's mean
    np.testing.assert_allclose(got - got.mean(axis=0), r - r.mean(axis=0), atol=1e-6)
    np.testing.assert_allclose(got.mean(axis=0), prior.mean(axis=0), atol=1e-6)


def test_pair_amplitude_solve_takes_the_prior_where_pairs_say_nothing():
    from descatter.tasks.amplitude_solve import pair_amplitude_solve

    rng = np.random.default_rng(9)
    n, n_freq = 6, 3
    prior = rng.normal(size=(n, n_freq))
    chain = np.array([[0, 1], [1, 2], [2, 3]])  # bipartite: a_j + a_k only; stations 4, 5 unpaired
    r = rng.normal(size=(n, n_freq))
    cross = np.exp(0.5 * r[chain[:, 0]] + 0.5 * r[chain[:, 1]])
    got = pair_amplitude_solve(chain, cross, np.ones(3), prior=prior, damping=1e-8)
    np.testing.assert_allclose(got[4:], prior[4:], atol=1e-9)
    assert np.all(np.isfinite(got))
    # the sums a_j + a_k the pairs do determine (up to the shared level) are honoured
    s = got[chain[:, 0]] + got[chain[:, 1]] - (r[chain[:, 0]] + r[chain[:, 1]])
    np.testing.assert_allclose(s - s.mean(axis=0), 0.0, atol=1e-6)
    with pytest.raises(ConfigError, match="cross"):
        pair_amplitude_solve(chain, cross[:2], np.ones(3), prior=prior)


def test_pair_amplitude_solve_is_not_flattened_by_noise():
    """Traces D = a_j s_i + n with white noise: log |D|^2 averaged over shots flattens a
    station's spectral shape where its signal is weak; the pair magnitudes do not."""
    from descatter.tasks.amplitude_solve import pair_amplitude_solve

    rng = np.random.default_rng(10)
    n, n_shots, n_freq = 10, 400, 8
    r = np.linspace(-2.0, 2.0, n_freq)[None, :] * rng.normal(size=(n, 1))  # tilted spectra
    s = rng.normal(size=(n_shots, 1, n_freq)) + 1j * rng.normal(size=(n_shots, 1, n_freq))
    noise = 0.7 * (rng.normal(size=(n_shots, n, n_freq)) + 1j * rng.normal(size=(n_shots, n, n_freq)))
    d = np.exp(0.5 * r)[None] * s + noise
    pairs = _triangulated_line(n)
    cross = np.einsum("ipf,ipf->pf", d[:, pairs[:, 0]], np.conj(d[:, pairs[:, 1]]))
    log_power = np.log(np.abs(d) ** 2).mean(axis=0)
    prior = log_power - log_power.mean(axis=0)
    got = pair_amplitude_solve(pairs, cross, np.full(len(pairs), n_shots), prior=prior)
    centred = lambda x: x - x.mean(axis=0)
    err_pairs = np.sqrt(np.mean((centred(got) - centred(r)) ** 2))
    err_log = np.sqrt(np.mean((centred(prior) - centred(r)) ** 2))
    print(f"rms error of the station terms: pairs {err_pairs:.3f}, log power {err_log:.3f}")
    assert err_pairs < 0.5 * err_log
