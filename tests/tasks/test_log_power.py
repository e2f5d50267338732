"""Log power and the log-spectral decomposition sums against a dense design matrix."""

from __future__ import annotations

import numpy as np
import pytest

from descatter.tasks.errors import ConfigError
from descatter.tasks.log_power import KINDS, log_power, log_power_sums, offset_bins

SIZES = {"source": 6, "receiver": 9, "offset": 5, "cmp": 7}


def _case(seed=0, n=120, n_freq=4, cmp=True):
    rng = np.random.default_rng(seed)
    index = {kind: rng.integers(0, size, n) for kind, size in SIZES.items()}
    if not cmp:
        del index["cmp"]
    values = rng.normal(0, 2, (n, n_freq))
    live = rng.random(n) < 0.8
    return values, index, live


def _sums(values, index, live):
    return log_power_sums(
        values, source=index["source"], receiver=index["receiver"], offset_bin=index["offset"],
        cmp_bin=index.get("cmp"), n_sources=SIZES["source"], n_receivers=SIZES["receiver"],
        n_offset_bins=SIZES["offset"], n_cmp_bins=SIZES["cmp"] if "cmp" in index else None, live=live,
    )


def _design(index, live):
    """Deliberately simple: the dense 0/1 design matrix of the live traces, one block per kind."""
    kinds = [k for k in KINDS if k in index]
    blocks = []
    for kind in kinds:
        block = np.zeros((int(live.sum()), SIZES[kind]))
        block[np.arange(live.sum()), index[kind][live]] = 1.0
        blocks.append(block)
    return kinds, blocks


def test_log_power_is_log_power_with_a_relative_floor():
    rng = np.random.default_rng(1)
    d = (rng.standard_normal((5, 8)) + 1j * rng.standard_normal((5, 8))).astype(np.complex64)
    d[2, 3] = 0.0  # a notch
    d[4] = 0.0  # a dead trace
    got = log_power(d, floor=1e-6)
    power = np.abs(d.astype(np.complex128)) ** 2
    ok = np.ones(d.shape, bool)
    ok[2, 3] = False
    ok[4] = False
    np.testing.assert_allclose(got[ok], np.log(power[ok]), rtol=1e-12)
    assert got[2, 3] == pytest.approx(np.log(1e-6 * power[2].mean()))
    assert np.all(got[4] == 0.0)
    assert got.dtype == np.float64 and np.all(np.isfinite(got))
    with pytest.raises(ConfigError, match="floor"):
        log_power(d, floor=0.0)


def test_offset_bins():
    got = offset_bins([0.0, 24.9, 25.0, -30.0, 1000.0], bin_m=25.0)
    np.testing.assert_array_equal(got, [0, 0, 1, 1, 40])
    assert got.dtype == np.int64
    with pytest.raises(ConfigError, match="bin_m"):
        offset_bins([1.0], bin_m=0.0)


@pytest.mark.parametrize("cmp", [True, False])
def test_sums_equal_dense_normal_equations(cmp):
    values, index, live = _case(cmp=cmp)
    got = _sums(values, index, live)
    kinds, blocks = _design(index, live)
    lv = values[live]
    assert sorted(got.sums) == sorted(kinds)
    for kind, block in zip(kinds, blocks):
        np.testing.assert_allclose(got.sums[kind], block.T @ lv, rtol=1e-12, atol=1e-12)  # A^T L
        np.testing.assert_array_equal(got.counts[kind], np.diag(block.T @ block))  # diagonal of A^T A
    expected_keys = [f"{a}|{b}" for i, a in enumerate(kinds) for b in kinds[i + 1:]]
    assert sorted(got.cross) == sorted(expected_keys)
    for key in expected_keys:
        a, b = key.split("|")
        dense = blocks[kinds.index(a)].T @ blocks[kinds.index(b)]  # off-diagonal block of A^T A
        rows = got.cross[key]
        assert rows.dtype == np.int64
        rebuilt = np.zeros_like(dense)
        rebuilt[rows[:, 0], rows[:, 1]] = rows[:, 2]
        np.testing.assert_array_equal(rebuilt, dense)
        assert np.all(rows[:, 2] > 0)
        np.testing.assert_array_equal(rows, rows[np.lexsort((rows[:, 1], rows[:, 0]))])  # sorted
    np.testing.assert_allclose(got.sum_sq, (lv**2).sum(axis=0), rtol=1e-12)
    assert got.n_traces == live.sum()


def test_sums_add_over_disjoint_traces():
    values, index, live = _case(seed=2)
    total = _sums(values, index, live)
    first = np.arange(len(values)) < 50
    parts = [_sums(values[m], {k: v[m] for k, v in index.items()}, live[m]) for m in (first, ~first)]
    added = parts[0] + parts[1]
    for kind in total.sums:
        # float64 sums regrouped: equal to 1e-12 relative
        np.testing.assert_allclose(added.sums[kind], total.sums[kind], rtol=1e-12, atol=1e-12)
        np.testing.assert_array_equal(added.counts[kind], total.counts[kind])
    for key in total.cross:
        np.testing.assert_array_equal(added.cross[key], total.cross[key])
    np.testing.assert_allclose(added.sum_sq, total.sum_sq, rtol=1e-12)
    assert added.n_traces == total.n_traces


def test_inputs_checked():
    values, index, live = _case(n=10)
    bad = dict(index, receiver=index["receiver"] + SIZES["receiver"])
    with pytest.raises(ConfigError, match="receiver"):
        _sums(values, bad, live)
    with pytest.raises(ConfigError, match="together"):
        log_power_sums(values, source=index["source"], receiver=index["receiver"], offset_bin=index["offset"],
                       cmp_bin=index["cmp"], n_sources=6, n_receivers=9, n_offset_bins=5)
    nan = values.copy()
    nan[np.flatnonzero(live)[0], 0] = np.nan
    with pytest.raises(ConfigError, match="not finite"):
        _sums(nan, index, live)
    nan[np.flatnonzero(live)[0], 0] = 0.0
    nan[np.flatnonzero(~live)[0], 0] = np.nan if (~live).any() else 0.0
    assert np.all(np.isfinite(_sums(nan, index, live).sum_sq))  # a dead trace's NaN is never read
