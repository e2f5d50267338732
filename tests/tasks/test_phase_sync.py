"""Phase synchronisation (Singer 2011) against dense linear algebra and known phases.

References: numpy.linalg.eigh of the dense Hermitian matrix H (the
eigenvector relaxation of Singer 2011, "Angular synchronization by
eigenvectors and semidefinite programming", Appl. Comput. Harmon. Anal. 30);
numpy.linalg.solve of the dense pinned connection Laplacian; and graphs with
planted phases.
"""

from __future__ import annotations

import logging

import numpy as np
import pytest
from scipy.sparse.csgraph import breadth_first_order
import scipy.sparse as sp

from descatter.tasks.errors import ConfigError, GeometryError
from descatter.tasks.phase_sync import concat_phase_solutions, phase_sync


def grid_pairs(side: int) -> np.ndarray:
    """8-neighbour square grid: int64 [m, 2], rows (a, b) with a < b."""
    idx = np.arange(side * side).reshape(side, side)
    e = [np.column_stack([idx[:, :-1].ravel(), idx[:, 1:].ravel()]),
         np.column_stack([idx[:-1, :].ravel(), idx[1:, :].ravel()]),
         np.column_stack([idx[:-1, :-1].ravel(), idx[1:, 1:].ravel()]),
         np.column_stack([idx[:-1, 1:].ravel(), idx[1:, :-1].ravel()])]
    return np.sort(np.concatenate(e), axis=1)


def planted(rng, n, n_freq):
    return np.exp(1j * rng.uniform(-np.pi, np.pi, (n, n_freq)))


def cross_of(z, pairs, rng=None, noise_rad=0.0):
    x = z[pairs[:, 0]] * np.conj(z[pairs[:, 1]]) * (1.0 + 0.0j)
    if rng is not None:
        x = x * rng.uniform(0.5, 3.0, x.shape)  # the modulus must not matter
        if noise_rad:
            x = x * np.exp(1j * noise_rad * rng.standard_normal(x.shape))
    return x


def gauge(z, labels=None):
    """Mean phase zero per component (labels) and column, by the documented rule."""
    z = np.array(z, dtype=np.complex128)
    labels = np.zeros(len(z), int) if labels is None else labels
    for c in np.unique(labels[labels >= 0]):
        s = z[labels == c].sum(axis=0)
        z[labels == c] *= np.conj(s) / np.abs(s)
    return z


def dense_h(pairs, cross, weight, n, f):
    h = np.zeros((n, n), np.complex128)
    v = weight[:, f] * cross[:, f] / np.abs(cross[:, f])
    np.add.at(h, (pairs[:, 0], pairs[:, 1]), v)
    np.add.at(h, (pairs[:, 1], pairs[:, 0]), np.conj(v))
    return h


# --------------------------------------------------------------------------- dense references


def test_eigen_matches_dense_eigh():
    rng = np.random.default_rng(0)
    n, nf = 40, 4
    pairs = np.array([(i, j) for i in range(n) for j in range(i + 1, n) if rng.random() < 0.2])
    z = planted(rng, n, nf)
    cross = cross_of(z, pairs, rng, noise_rad=0.6)
    weight = rng.uniform(0.2, 1.0, cross.shape)
    sol = phase_sync(pairs, cross, weight, n_stations=n, method="eigen")
    for f in range(nf):
        vec = np.linalg.eigh(dense_h(pairs, cross, weight, n, f))[1][:, -1]  # numpy.linalg.eigh
        ref = gauge((vec / np.abs(vec))[:, None])[:, 0]
        np.testing.assert_allclose(sol.z[:, f], ref, atol=1e-8)
    assert sol.n_components == 1 and sol.residual.min() > 0.01  # noisy: not a trivial consistent case


def test_laplacian_matches_dense_pinned_solve():
    rng = np.random.default_rng(1)
    n, nf = 30, 3
    pairs = np.array([(i, j) for i in range(n) for j in range(i + 1, n) if rng.random() < 0.25])
    z = planted(rng, n, nf)
    cross = cross_of(z, pairs, rng, noise_rad=0.5)
    weight = rng.uniform(0.2, 1.0, cross.shape)
    sol = phase_sync(pairs, cross, weight, n_stations=n)
    for f in range(nf):
        h = dense_h(pairs, cross, weight, n, f)
        lap = np.diag(np.abs(h).sum(axis=1)) - h
        x = np.ones(n, np.complex128)
        x[1:] = np.linalg.solve(lap[1:, 1:], h[1:, 0])  # station 0 pinned at 1
        np.testing.assert_allclose(sol.z[:, f], gauge((x / np.abs(x))[:, None])[:, 0], atol=1e-9)


# --------------------------------------------------------------------------- exact recovery


@pytest.mark.parametrize("method", ["laplacian", "eigen"])
def test_exact_recovery_on_a_connected_noise_free_graph(method):
    rng = np.random.default_rng(2)
    pairs = grid_pairs(9)
    z = planted(rng, 81, 5)
    sol = phase_sync(pairs, cross_of(z, pairs, rng), rng.uniform(0.1, 1, (len(pairs), 5)), n_stations=81, method=method)
    np.testing.assert_allclose(sol.z, gauge(z), atol=1e-9)
    np.testing.assert_allclose(np.angle(sol.z.sum(axis=0)), 0.0, atol=1e-12)  # the gauge: circular mean zero
    assert sol.residual.max() < 1e-18 and sol.n_components == 1 and not sol.isolated.any()


@pytest.mark.parametrize("method", ["laplacian", "eigen"])
def test_each_component_is_recovered_up_to_its_own_gauge(method):
    rng = np.random.default_rng(3)
    big = grid_pairs(6)                                   # stations 0..35
    small = np.array([[36, 37], [37, 38], [36, 38], [38, 39]])  # a triangle with a tail
    chain = np.column_stack([np.arange(41, 60), np.arange(42, 61)])  # stations 41..60; 40 is isolated
    pairs = np.concatenate([big, small, chain])
    n, nf = 61, 3
    z = planted(rng, n, nf)
    sol = phase_sync(pairs, cross_of(z, pairs, rng), np.ones(len(pairs)), n_stations=n, method=method)
    expect = np.full(n, -1)
    expect[:36], expect[36:40], expect[41:] = 0, 1, 2
    np.testing.assert_array_equal(sol.component, expect)
    assert sol.n_components == 3 and sol.isolated.tolist() == [i == 40 for i in range(n)]
    np.testing.assert_allclose(sol.z, np.where(sol.isolated[:, None], 1.0, gauge(z, expect)), atol=1e-9)
    for c in range(3):
        ratio = sol.z[expect == c] * np.conj(z[expect == c])
        np.testing.assert_allclose(ratio, np.broadcast_to(ratio[:1], ratio.shape), atol=1e-9)  # one constant each


def test_a_chain_is_solved_exactly_even_with_noise():
    # a tree has no cycles to disagree: the least squares fits every pair exactly
    rng = np.random.default_rng(4)
    n, nf = 3000, 4
    pairs = np.column_stack([np.arange(n - 1), np.arange(1, n)])
    z = planted(rng, n, nf)
    clean = phase_sync(pairs, cross_of(z, pairs), np.ones(n - 1), n_stations=n)
    np.testing.assert_allclose(clean.z, gauge(z), atol=1e-8)
    noisy_cross = cross_of(z, pairs, rng, noise_rad=1.0)
    noisy = phase_sync(pairs, noisy_cross, rng.uniform(0.1, 1, (n - 1, nf)), n_stations=n)
    h = noisy_cross / np.abs(noisy_cross)
    np.testing.assert_allclose(noisy.z[:-1] * np.conj(noisy.z[1:]), h, atol=1e-8)
    assert noisy.residual.max() < 1e-16


def test_eigen_falls_back_to_the_laplacian_where_arpack_fails(caplog):
    rng = np.random.default_rng(5)
    n = 400
    pairs = np.column_stack([np.arange(n - 1), np.arange(1, n)])
    z = planted(rng, n, 2)
    with caplog.at_level(logging.WARNING, logger="descatter.tasks.phase_sync"):
        sol = phase_sync(pairs, cross_of(z, pairs), np.ones(n - 1), n_stations=n, method="eigen", eigen_maxiter=3)
    assert "ARPACK did not converge" in caplog.text
    np.testing.assert_allclose(sol.z, gauge(z), atol=1e-8)


# --------------------------------------------------------------------------- noise


def tree_propagation(pairs, cross, n):
    """Phases carried along a breadth-first spanning tree from station 0 (uses n - 1 pairs)."""
    g = sp.coo_matrix((np.ones(len(pairs)), (pairs[:, 0], pairs[:, 1])), shape=(n, n)).tocsr()
    order, parent = breadth_first_order(g + g.T, 0, directed=False)
    look = {(int(a), int(b)): i for i, (a, b) in enumerate(pairs)}
    z = np.ones((n, cross.shape[1]), np.complex128)
    for j in order[1:]:
        p = parent[j]
        h = cross[look[(j, p)]] if (j, p) in look else np.conj(cross[look[(p, j)]])
        z[j] = h / np.abs(h) * z[p]
    return z


@pytest.mark.parametrize("method", ["laplacian", "eigen"])
def test_noise_is_averaged_over_all_pairs(method):
    rng = np.random.default_rng(6)
    side, nf, sigma = 20, 6, 0.4
    pairs = grid_pairs(side)
    n = side * side
    z = planted(rng, n, nf)
    cross = cross_of(z, pairs, rng, noise_rad=sigma)
    sol = phase_sync(pairs, cross, np.ones(len(pairs)), n_stations=n, method=method)

    def rms_error(estimate):  # about the mean error of each column (the two gauges differ by it)
        d = np.angle(estimate * np.conj(z))
        d = np.angle(np.exp(1j * (d - np.angle(np.exp(1j * d).mean(axis=0)))))
        return np.sqrt(np.mean(d**2))

    err, tree_err = rms_error(sol.z), rms_error(tree_propagation(pairs, cross, n))
    # least squares over 8 pairs per station: well below the pair noise, and far below
    # carrying phases along a spanning tree, whose errors add up along its paths
    assert err < 0.8 * sigma and err < 0.25 * tree_err
    # each station's residual is about the pair noise variance, |1 - exp(i e)|^2 ~ e^2
    assert 0.5 * sigma**2 < np.median(sol.station_residual) < 1.5 * sigma**2


# --------------------------------------------------------------------------- blocks, splits, residuals


def test_frequency_blocks_concatenate_to_the_full_solve():
    rng = np.random.default_rng(7)
    pairs = grid_pairs(7)
    z = planted(rng, 49, 7)
    cross = cross_of(z, pairs, rng, noise_rad=0.3)
    weight = rng.uniform(0.2, 1, cross.shape)
    full = phase_sync(pairs, cross, weight, n_stations=49)
    parts = [phase_sync(pairs, cross, weight, n_stations=49, columns=c) for c in (slice(0, 3), np.array([3, 4]), slice(5, 7))]
    joined = concat_phase_solutions(parts)
    np.testing.assert_allclose(joined.z, full.z, atol=1e-12)
    np.testing.assert_allclose(joined.station_residual, full.station_residual, atol=1e-12)
    assert joined.columns.tolist() == list(range(7))


def test_a_frequency_where_the_graph_splits_is_solved_per_piece():
    rng = np.random.default_rng(8)
    left = grid_pairs(4)
    right = grid_pairs(4) + 16
    bridge = np.array([[3, 16], [15, 28]])
    pairs = np.concatenate([left, right, bridge])
    z = planted(rng, 32, 3)
    cross = cross_of(z, pairs, rng)
    weight = np.ones(cross.shape)
    weight[-2:, 1] = 0.0  # the bridge carries nothing at column 1
    sol = phase_sync(pairs, cross, weight, n_stations=32)
    assert sol.n_components == 1 and sol.frequency_components.tolist() == [1, 2, 1]
    np.testing.assert_allclose(sol.z[:, [0, 2]], gauge(z[:, [0, 2]]), atol=1e-9)
    halves = np.repeat([0, 1], 16)
    np.testing.assert_allclose(sol.z[:, [1]], gauge(z[:, [1]], halves), atol=1e-9)


def test_residuals_match_a_loop_over_pairs():
    rng = np.random.default_rng(9)
    n = 25
    pairs = grid_pairs(5)
    z = planted(rng, n, 2)
    cross = cross_of(z, pairs, rng, noise_rad=0.7)
    weight = rng.uniform(0, 1, cross.shape)
    weight[::5, 0] = 0.0  # unused pairs do not count
    weight[(pairs == 0).any(axis=1), 0] = 0.0  # station 0 has no usable pair at column 0
    sol = phase_sync(pairs, cross, weight, n_stations=n)
    for f in range(2):
        num, den = np.zeros(n), np.zeros(n)
        for (a, b), x, w in zip(pairs, cross[:, f], weight[:, f]):
            if w > 0:
                e = abs(sol.z[a, f] * np.conj(sol.z[b, f]) - x / abs(x)) ** 2
                num[[a, b]] += w * e
                den[[a, b]] += w
        assert (den[0] == 0) == (f == 0)  # no usable pair: residual 0, not NaN
        np.testing.assert_allclose(sol.station_residual[:, f], np.divide(num, den, out=np.zeros(n), where=den > 0),
                                   rtol=1e-12)
        np.testing.assert_allclose(sol.residual[f], num.sum() / den.sum(), rtol=1e-12)


def test_input_errors():
    pairs = np.array([[0, 1], [1, 2]])
    cross = np.ones((2, 3), np.complex128)
    with pytest.raises(GeometryError, match="n_stations"):
        phase_sync(pairs, cross, np.ones(2), n_stations=2)
    with pytest.raises(GeometryError, match="itself"):
        phase_sync(np.array([[0, 0], [1, 2]]), cross, np.ones(2), n_stations=3)
    with pytest.raises(ConfigError, match="weight"):
        phase_sync(pairs, cross, np.ones((2, 2)), n_stations=3)
    with pytest.raises(ConfigError, match="method"):
        phase_sync(pairs, cross, np.ones(2), n_stations=3, method="power")
    empty = phase_sync(np.zeros((0, 2), np.int64), np.zeros((0, 3), np.complex128), np.zeros((0, 3)), n_stations=4)
    assert empty.isolated.all() and np.all(empty.z == 1) and empty.n_components == 0


def test_eigen_warm_start_converges_to_the_cold_answer():
    # ARPACK started from the answer of nearly the same problem (an earlier solution) reaches the
    # same eigenvector as from the flat start
    rng = np.random.default_rng(11)
    side, n_freq = 12, 3
    pairs = grid_pairs(side)
    n = side * side
    z = planted(rng, n, n_freq)
    cross = cross_of(z, pairs, rng, noise_rad=0.3)
    weight = np.ones((len(pairs), n_freq))
    cold = phase_sync(pairs, cross, weight, n_stations=n, method="eigen")
    earlier = phase_sync(pairs, cross * np.exp(0.05j * rng.standard_normal(cross.shape)), weight,
                         n_stations=n, method="eigen")
    warm = phase_sync(pairs, cross, weight, n_stations=n, method="eigen", initial=earlier.z)
    np.testing.assert_allclose(warm.z, cold.z, atol=1e-6)
    with pytest.raises(ConfigError, match="initial has shape"):
        phase_sync(pairs, cross, weight, n_stations=n, method="eigen", initial=earlier.z[:-1])
