"""The noise-to-signal ratio from pair sums, against signal and noise planted at known powers."""

from __future__ import annotations

import numpy as np
import pytest

from descatter.tasks.errors import ConfigError
from descatter.tasks.statistics import RHO_FLOOR, coherence_totals, noise_to_signal


def _gaussian(rng, shape, power):
    """Circular complex Gaussian samples of the given power (E|x|^2) per last-axis column."""
    return np.sqrt(np.asarray(power) / 2) * (rng.normal(size=shape) + 1j * rng.normal(size=shape))


def _pair_sums(a, b):
    """cross, power_a, power_b of records a, b: complex [n_pairs, n_records, n_freq]."""
    return (a * np.conj(b)).sum(axis=1), (np.abs(a) ** 2).sum(axis=1), (np.abs(b) ** 2).sum(axis=1)


def _planted(rng, *, n_pairs, n_records, signal, noise_a, noise_b=None, alike=1.0):
    """Two traces per pair: g_a s + n_a and g_b s_b + n_b, with g unit-modulus station phases
    (a station filter that the coherence must cancel), s_b = alike s + sqrt(1 - alike^2) s'."""
    shape = (n_pairs, n_records, len(signal))
    s = _gaussian(rng, shape, signal)
    s_b = alike * s + np.sqrt(1 - alike**2) * _gaussian(rng, shape, signal)
    g_a, g_b = (np.exp(2j * np.pi * rng.random((n_pairs, 1, len(signal)))) for _ in range(2))
    a = g_a * s + _gaussian(rng, shape, noise_a)
    b = g_b * s_b + _gaussian(rng, shape, noise_a if noise_b is None else noise_b)
    return _pair_sums(a, b)


def test_noise_to_signal_recovers_planted_ratios():
    # Two traces s + n_a, s + n_b, independent noise of power N, signal of power S:
    # E[cross] = n S, E[P_a] = E[P_b] = n (S + N), so |cross| / sqrt(P_a P_b) -> S / (S + N)
    # and (1 - rho) / rho -> N / S. With 60 pairs x 2500 records the estimate's scatter is about
    # 1 % of N/S (rho's error ~ (1 + N/S) / sqrt(1.5e5); measured over seeds): 4 % is > 3 sigma.
    rng = np.random.default_rng(11)
    signal = np.array([1.0, 2.0, 0.5, 1.0, 4.0, 1.0])
    ratio = np.array([0.1, 0.3, 1.0, 2.0, 0.5, 3.0])
    cross, pa, pb = _planted(rng, n_pairs=60, n_records=2500, signal=signal, noise_a=ratio * signal)
    got = noise_to_signal(*coherence_totals(cross, pa, pb))
    np.testing.assert_allclose(got, ratio, rtol=0.04)


def test_unequal_noise_gives_the_geometric_mean_of_one_plus_the_ratios():
    # Traces with N/S = nu_a and nu_b: rho -> S / sqrt((S + N_a)(S + N_b)), so
    # 1 + N/S -> sqrt((1 + nu_a)(1 + nu_b)) (what the docstring states).
    rng = np.random.default_rng(12)
    signal = np.ones(3)
    nu_a, nu_b = np.array([0.2, 1.0, 0.1]), np.array([0.8, 3.0, 2.0])
    cross, pa, pb = _planted(rng, n_pairs=100, n_records=4000, signal=signal, noise_a=nu_a, noise_b=nu_b)
    got = noise_to_signal(*coherence_totals(cross, pa, pb))
    np.testing.assert_allclose(1 + got, np.sqrt((1 + nu_a) * (1 + nu_b)), rtol=0.02)


def test_unlike_earth_responses_overstate_the_noise():
    # Neighbours whose signals correlate only 0.8 (after the station filters): rho -> 0.8 S / (S + N),
    # so the estimate sits above the planted N/S: 1 / (0.8 / 1.5) - 1 = 0.875 against 0.5.
    rng = np.random.default_rng(13)
    signal, ratio = np.ones(2), np.array([0.5, 0.5])
    cross, pa, pb = _planted(rng, n_pairs=100, n_records=4000, signal=signal, noise_a=ratio, alike=0.8)
    got = noise_to_signal(*coherence_totals(cross, pa, pb))
    np.testing.assert_allclose(got, 1 / (0.8 / 1.5) - 1, rtol=0.03)


def test_few_records_per_pair_understate_the_noise():
    # With 3 records a pair's noise products do not cancel in |cross|: rho is biased up.
    rng = np.random.default_rng(14)
    signal, ratio = np.ones(2), np.array([1.0, 1.0])
    cross, pa, pb = _planted(rng, n_pairs=20000, n_records=3, signal=signal, noise_a=ratio)
    got = noise_to_signal(*coherence_totals(cross, pa, pb))
    assert np.all(got < 0.8 * ratio)


def test_totals_of_pair_sets_add_up_and_edge_cases():
    rng = np.random.default_rng(15)
    cross, pa, pb = _planted(rng, n_pairs=30, n_records=50, signal=np.ones(4), noise_a=np.ones(4))
    whole = coherence_totals(cross, pa, pb)
    parts = [coherence_totals(cross[s], pa[s], pb[s]) for s in (slice(0, 12), slice(12, None))]
    for k in range(2):  # receiver and source pair totals pool by adding
        np.testing.assert_allclose(parts[0][k] + parts[1][k], whole[k], rtol=1e-13)
    # no coherent energy: the floor, finite; no energy at all: NaN (nothing measured)
    got = noise_to_signal(np.array([0.0, 0.0, 2.0]), np.array([1.0, 0.0, 2.0]))
    assert got[0] == pytest.approx(1 / RHO_FLOOR - 1) and np.isnan(got[1]) and got[2] == 0.0
    with pytest.raises(ConfigError, match=r"cross \(30, 4\), power_a \(30, 3\)"):
        coherence_totals(cross, pa[:, :3], pb)
    with pytest.raises(ConfigError, match=r"coherent \(4,\) and total \(3,\)"):
        noise_to_signal(whole[0], whole[1][:3])


def test_merge_rows_agrees_with_numpy_unique_on_rows():
    from descatter.tasks.statistics import _merge_rows

    rng = np.random.default_rng(4)
    a = np.unique(np.sort(rng.integers(0, 300, (500, 2)), axis=1), axis=0)
    b = np.unique(np.sort(rng.integers(0, 300, (400, 2)), axis=1), axis=0)
    union, ia, ib = _merge_rows(a, b)
    # reference: numpy.unique over rows (lexicographic), the definition of the merged table
    ref, inv = np.unique(np.concatenate([a, b]), axis=0, return_inverse=True)
    assert np.array_equal(union, ref) and union.dtype == np.int64
    assert np.array_equal(ia, inv.reshape(-1)[: len(a)]) and np.array_equal(ib, inv.reshape(-1)[len(a):])
    empty, ea, eb = _merge_rows(np.zeros((0, 2), np.int64), np.zeros((0, 2), np.int64))
    assert empty.shape == (0, 2) and ea.size == eb.size == 0


def test_merge_rows_outside_the_packed_range_falls_back_to_rows():
    from descatter.tasks.statistics import _merge_rows

    a = np.array([[0, 2**31 + 5], [1, 2]], np.int64)  # a station index too large for the packed key
    b = np.array([[1, 2], [3, 4]], np.int64)
    union, ia, ib = _merge_rows(a, b)
    ref, inv = np.unique(np.concatenate([a, b]), axis=0, return_inverse=True)  # numpy.unique over rows
    assert np.array_equal(union, ref)
    assert np.array_equal(ia, inv.reshape(-1)[:2]) and np.array_equal(ib, inv.reshape(-1)[2:])


def test_log_power_cross_tables_merge_like_numpy_unique_and_add_at():
    from descatter.tasks.statistics import LogPowerSums

    rng = np.random.default_rng(8)

    def part(n_rows):
        ij = np.unique(rng.integers(0, 400, (n_rows, 2)), axis=0)
        rows = np.column_stack([ij, rng.integers(1, 50, len(ij))]).astype(np.int64)
        return LogPowerSums({"source": np.ones((400, 3))}, {"source": np.ones(400, np.int64)},
                            {"source|receiver": rows}, np.ones(3), 10)

    a, b = part(900), part(700)
    got = (a + b).cross["source|receiver"]
    # reference: numpy.unique over rows, then numpy.add.at of the counts
    both = np.concatenate([a.cross["source|receiver"], b.cross["source|receiver"]])
    ij, inv = np.unique(both[:, :2], axis=0, return_inverse=True)
    cnt = np.zeros(len(ij), np.int64)
    np.add.at(cnt, inv.reshape(-1), both[:, 2])
    assert np.array_equal(got, np.column_stack([ij, cnt])) and got.dtype == np.int64


def test_total_of_many_parts_equals_the_left_fold_bit_for_bit():
    from descatter.tasks.statistics import PairSums

    rng = np.random.default_rng(21)

    def part(n_rows, n_freq=5):
        ij = np.unique(np.sort(rng.integers(0, 200, (n_rows, 2)), axis=1), axis=0)
        ij = ij[ij[:, 0] != ij[:, 1]]
        m = len(ij)
        return PairSums(ij, rng.normal(size=(m, n_freq)) + 1j * rng.normal(size=(m, n_freq)),
                        rng.random((m, n_freq)), rng.random((m, n_freq)), rng.integers(1, 9, m))

    parts = [part(n) for n in (300, 50, 400, 1, 250)]
    fold = parts[0]
    for p in parts[1:]:
        fold = fold + p
    loaded = []
    got = PairSums.total([p.pairs for p in parts], lambda i: loaded.append(i) or parts[i], 5)
    assert loaded == [0, 1, 2, 3, 4]  # each part read once, in order
    for name in ("pairs", "cross", "power_a", "power_b", "count"):
        assert np.array_equal(getattr(got, name), getattr(fold, name)), name
    assert PairSums.total([], None, 5).cross.shape == (0, 5)
    with pytest.raises(ConfigError, match="part 1"):
        PairSums.total([parts[0].pairs, parts[0].pairs], lambda i: parts[i], 5)
