"""Station graph and pair sums against brute force, plain loops and scipy.signal.correlate."""

from __future__ import annotations

import time

import numpy as np
import pytest
from scipy.signal import correlate
from scipy.sparse.csgraph import minimum_spanning_tree

from descatter.tasks import pairs as pairs_module
from descatter.tasks.errors import ConfigError, GeometryError
from descatter.tasks.geometry import assign_stations, shot_ids, station_keys
from descatter.tasks.pairs import (
    _delaunay_candidates,
    _tree_over_components,
    bridge_components,
    graph_components,
    neighbour_pairs,
    receiver_pair_sums,
    source_pair_sums,
    source_pair_sums_between,
)
from descatter.tasks.spectra import band_frequencies, windowed_spectra
from descatter.tasks.statistics import PairSums
from descatter.tasks.synthetic import station_truth, stations, swath_traces, synthesize, synthetic_spec

# --------------------------------------------------------------------------- references


def _brute_pairs(x, y, radius):
    d = np.hypot(x[:, None] - x[None, :], y[:, None] - y[None, :])
    a, b = np.nonzero(np.triu(d <= radius, k=1))
    return np.column_stack([a, b])


def _union_find_labels(n, pairs):
    parent = list(range(n))

    def root(i):
        while parent[i] != i:
            i = parent[i]
        return i

    for a, b in pairs:
        ra, rb = root(int(a)), root(int(b))
        if ra != rb:
            parent[max(ra, rb)] = min(ra, rb)
    roots = [root(i) for i in range(n)]
    names = {}
    return np.array([names.setdefault(r, len(names)) for r in roots])


def _loop_pair_sums(spectra, group, station, pairs, live):
    """Deliberately simple: for every group, for every allowed pair, first live trace of each station."""
    pairs = np.unique(np.sort(np.asarray(pairs), axis=1), axis=0)
    out = {}
    for g in np.unique(group):
        first = {}
        for t in range(len(group)):
            if group[t] == g and live[t]:
                first.setdefault(int(station[t]), t)
        for a, b in pairs:
            if a in first and b in first:
                da = spectra[first[a]].astype(np.complex128)
                db = spectra[first[b]].astype(np.complex128)
                acc = out.setdefault((int(a), int(b)), [0, 0, 0, 0])
                acc[0] = acc[0] + da * np.conj(db)
                acc[1] = acc[1] + np.abs(da) ** 2
                acc[2] = acc[2] + np.abs(db) ** 2
                acc[3] += 1
    return out


def _assert_sums_equal(got: PairSums, want: dict, rtol=1e-6):
    """The kernel multiplies complex64 spectra in complex64 and sums in complex128; the
    loop multiplies in complex128 (exact for float32 inputs). So they agree to float32
    rounding of each product: relative to the powers, and for the cross sums relative to
    their Cauchy-Schwarz bound sqrt(power_a power_b) (a sum of unlike products can cancel)."""
    assert [tuple(p) for p in got.pairs] == sorted(want)
    for row, key in enumerate(sorted(want)):
        cross, pa, pb, count = want[key]
        bound = np.sqrt(pa * pb)
        assert np.all(np.abs(got.cross[row] - cross) <= rtol * bound + 1e-30), key
        np.testing.assert_allclose(got.power_a[row], pa, rtol=rtol)
        np.testing.assert_allclose(got.power_b[row], pb, rtol=rtol)
        assert got.count[row] == count


def _assert_identical(a: PairSums, b: PairSums):
    for key, value in a.to_arrays().items():
        np.testing.assert_array_equal(value, b.to_arrays()[key])


def _random_survey(seed=0, n_shots=12, n_receivers=15, n_freq=7, p_live=0.85):
    """Shots recording random subsets of receivers, spread over the input in random order."""
    rng = np.random.default_rng(seed)
    shot, rcv = [], []
    for s in range(n_shots):
        chosen = np.flatnonzero(rng.random(n_receivers) < 0.7)
        shot += [1000 + 7 * s] * len(chosen)
        rcv += chosen.tolist()
    shot, rcv = np.array(shot, np.int64), np.array(rcv, np.int64)
    order = rng.permutation(len(shot))
    shot, rcv = shot[order], rcv[order]
    n = len(shot)
    spectra = (rng.standard_normal((n, n_freq)) + 1j * rng.standard_normal((n, n_freq))).astype(np.complex64)
    live = rng.random(n) < p_live
    all_pairs = np.array([(a, b) for a in range(n_receivers) for b in range(a + 1, n_receivers)])
    pairs = all_pairs[rng.random(len(all_pairs)) < 0.4]
    pairs[::3] = pairs[::3, ::-1]  # rows may come either way round
    pairs = np.concatenate([pairs, [[n_receivers + 2, n_receivers + 5]]])  # a pair nobody records
    return spectra, shot, rcv, pairs, live


# --------------------------------------------------------------------------- the station graph


def test_neighbour_pairs_equal_brute_force():
    rng = np.random.default_rng(0)
    x, y = rng.uniform(0, 300, 200), rng.uniform(0, 200, 200)
    x[10], y[10] = x[11], y[11]  # coincident stations pair at distance 0
    got = neighbour_pairs(x, y, radius_m=30.0)
    assert got.dtype == np.int64
    np.testing.assert_array_equal(got, _brute_pairs(x, y, 30.0))  # brute force is already sorted
    assert [10, 11] in got.tolist()
    assert neighbour_pairs(x[:1], y[:1], radius_m=30.0).shape == (0, 2)
    # the station table only grows: pairs among earlier stations do not change
    more = neighbour_pairs(np.append(x, [5.0, 6.0]), np.append(y, [5.0, 6.0]), radius_m=30.0)
    np.testing.assert_array_equal(more[(more < 200).all(axis=1)], got)
    with pytest.raises(GeometryError, match="non-finite"):
        neighbour_pairs(np.array([0.0, np.nan]), np.zeros(2), radius_m=1.0)


def test_graph_components_equal_union_find():
    rng = np.random.default_rng(1)
    n = 80
    pairs = rng.integers(0, n, (60, 2))
    pairs = pairs[pairs[:, 0] != pairs[:, 1]]
    count, labels = graph_components(n, pairs)
    want = _union_find_labels(n, pairs)
    np.testing.assert_array_equal(labels, want)
    assert count == want.max() + 1
    assert graph_components(3, np.zeros((0, 2), np.int64))[0] == 3
    with pytest.raises(ConfigError, match="beyond"):
        graph_components(3, [[0, 5]])


def _grid(lines, per_line, dx=12.5, dy=50.0):
    r, k = np.divmod(np.arange(lines * per_line), per_line)
    return k * dx, r * dy


def test_bridge_receiver_lines_below_line_spacing():
    # common practice: a radius below the 50 m line interval pairs only along lines
    x, y = _grid(4, 30)
    pairs = neighbour_pairs(x, y, radius_m=20.0)
    assert graph_components(len(x), pairs)[0] == 4
    extra, report = bridge_components(x, y, pairs, per_bridge=3)
    assert len(report) == 3 and all(r["bridged"] and r["n_pairs"] == 3 for r in report)
    assert all(r["distance_m"] == pytest.approx(50.0) for r in report)
    np.testing.assert_allclose(np.hypot(*(np.array([x, y])[:, extra[:, 0]] - np.array([x, y])[:, extra[:, 1]])), 50.0)
    assert graph_components(len(x), np.concatenate([pairs, extra]))[0] == 1
    assert not set(map(tuple, extra.tolist())) & set(map(tuple, pairs.tolist()))
    # already connected: nothing to add
    assert bridge_components(x, y, np.concatenate([pairs, extra]))[0].shape == (0, 2)


def _dense_component_tree(x, y, labels, n_comp):
    """Reference: smallest station distance between every two components, scipy's MST over them."""
    d = np.hypot(x[:, None] - x[None, :], y[:, None] - y[None, :])
    comp = np.zeros((n_comp, n_comp))
    for a in range(n_comp):
        for b in range(a + 1, n_comp):
            comp[a, b] = d[np.ix_(labels == a, labels == b)].min() + 1.0  # +1: zero distances stay edges
    tree = minimum_spanning_tree(comp).toarray()
    return d, np.sort(tree[tree > 0] - 1.0)


def _clusters(seed):
    rng = np.random.default_rng(seed)
    centres = rng.uniform(0, 2000, (9, 2))
    return np.concatenate([c + rng.normal(0, 40, (int(rng.integers(1, 30)), 2)) for c in centres]).T


def _jittered_lines(seed):
    rng = np.random.default_rng(seed)
    x, y = _grid(5, 25)
    keep = rng.random(len(x)) < 0.9
    return x[keep] + rng.normal(0, 1.0, keep.sum()), y[keep] + rng.normal(0, 3.0, keep.sum())


@pytest.mark.parametrize("points", [_clusters, _jittered_lines])
@pytest.mark.parametrize("seed", [2, 3])
def test_bridge_tree_equals_dense_minimum_spanning_tree(points, seed):
    x, y = points(seed)
    pairs = neighbour_pairs(x, y, radius_m=30.0)
    n_comp, labels = graph_components(len(x), pairs)
    assert n_comp > 3
    extra, report = bridge_components(x, y, pairs, per_bridge=2)
    d, want = _dense_component_tree(x, y, labels, n_comp)
    np.testing.assert_allclose(sorted(r["distance_m"] for r in report), want, rtol=1e-12)
    # per bridge the two nearest cross pairs, by brute force
    for r in report:
        cross = d[np.ix_(labels == r["component_a"], labels == r["component_b"])]
        assert r["max_pair_distance_m"] == pytest.approx(np.sort(cross.ravel())[min(2, cross.size) - 1])
    assert graph_components(len(x), np.concatenate([pairs, extra]))[0] == 1
    # the Delaunay route alone gives the same tree (the nearest-neighbour route proves it for lines)
    pts = np.column_stack([x, y])
    tree = _tree_over_components(pts, labels, n_comp, *_delaunay_candidates(pts))
    np.testing.assert_allclose(np.sort(tree[2]), want, rtol=1e-12)


@pytest.mark.parametrize("case", ["coincident", "collinear", "grid"])
def test_delaunay_candidates_hold_the_tree_in_degenerate_layouts(case):
    rng = np.random.default_rng(9)
    if case == "coincident":  # 20 stations on 4 positions, 5 each
        x, y = np.repeat(rng.uniform(0, 100, 4), 5), np.repeat(rng.uniform(0, 100, 4), 5)
    elif case == "collinear":
        t = np.sort(rng.uniform(0, 1000, 40))
        x, y = 3.0 + 0.6 * t, -2.0 + 0.8 * t
    else:  # a perfect grid: every Delaunay circle holds four stations
        x, y = _grid(6, 8, dx=10.0, dy=10.0)
    labels = rng.integers(0, 6, len(x))
    labels[:6] = np.arange(6)  # all six labels used
    d, want = _dense_component_tree(x, y, labels, 6)
    pts = np.column_stack([x, y])
    np.testing.assert_allclose(np.sort(_tree_over_components(pts, labels, 6, *_delaunay_candidates(pts))[2]),
                               want, rtol=1e-12, atol=1e-12)


def test_bridge_max_distance_coincident_and_collinear():
    # a far cluster stays apart and is reported
    x, y = _grid(2, 10)
    x, y = np.append(x, [5000.0, 5010.0]), np.append(y, [0.0, 0.0])
    pairs = neighbour_pairs(x, y, radius_m=20.0)
    extra, report = bridge_components(x, y, pairs, per_bridge=1, max_distance_m=100.0)
    assert [r["bridged"] for r in report] == [True, False]
    assert report[1]["n_pairs"] == 0 and np.isnan(report[1]["max_pair_distance_m"])
    assert graph_components(len(x), np.concatenate([pairs, extra]))[0] == 2
    # two stations at one position but in different components bridge at distance 0
    x2, y2 = np.array([0.0, 0.0, 100.0]), np.array([0.0, 0.0, 0.0])
    extra, report = bridge_components(x2, y2, np.zeros((0, 2), np.int64), per_bridge=1)
    assert report[0]["distance_m"] == 0.0 and [0, 1] in extra.tolist()
    # collinear stations (one line with gaps): consecutive stations across each gap
    xl = np.array([0.0, 10.0, 20.0, 200.0, 210.0, 500.0])
    extra, report = bridge_components(xl, np.zeros(6), neighbour_pairs(xl, np.zeros(6), radius_m=15.0), per_bridge=1)
    assert extra.tolist() == [[2, 3], [4, 5]]
    assert [r["distance_m"] for r in report] == [180.0, 290.0]


def test_bridge_scales_to_1e5_stations():
    x, y = _grid(100, 1000)
    pairs = neighbour_pairs(x, y, radius_m=20.0)
    start = time.perf_counter()
    extra, report = bridge_components(x, y, pairs, per_bridge=3)
    elapsed = time.perf_counter() - start
    assert len(report) == 99 and len(extra) == 297
    assert graph_components(len(x), np.concatenate([pairs, extra]))[0] == 1
    assert elapsed < 10.0  # O(n log n): about a second on 2 cores; a dense O(n^2) search would not fit


# --------------------------------------------------------------------------- receiver pair sums


@pytest.mark.parametrize("block", [512, 7])
def test_receiver_pair_sums_equal_loop_over_shots_and_pairs(block, monkeypatch):
    monkeypatch.setattr(pairs_module, "_BLOCK_PRODUCTS", block)  # one block, or many small ones
    spectra, shot, rcv, pairs, live = _random_survey()
    got = receiver_pair_sums(spectra, shot=shot, receiver=rcv, pairs=pairs, live=live)
    want = _loop_pair_sums(spectra, shot, rcv, pairs, live)
    assert got.cross.dtype == np.complex128 and got.power_a.dtype == np.float64 and got.count.dtype == np.int64
    assert len(want) > 10
    _assert_sums_equal(got, want)


def test_receiver_cross_spectrum_is_summed_cross_correlation():
    # inverse FFT of sum_i D_ij conj(D_ik) = sum_i of the cross-correlations of d_ij and d_ik,
    # with scipy.signal.correlate as the reference (n_fft >= 2L - 1 so nothing wraps)
    rng = np.random.default_rng(3)
    n_shots, n_rcv, length, n_fft = 5, 4, 64, 128
    d = rng.standard_normal((n_shots, n_rcv, length))
    spectra = np.fft.rfft(d, n=n_fft, axis=-1).reshape(-1, n_fft // 2 + 1).astype(np.complex64)
    shot = np.repeat(np.arange(n_shots), n_rcv)
    rcv = np.tile(np.arange(n_rcv), n_shots)
    sums = receiver_pair_sums(spectra, shot=shot, receiver=rcv, pairs=[[0, 1], [2, 3], [1, 3]])
    lags = np.arange(-(length - 1), length)
    for row, (j, k) in enumerate(sums.pairs):
        got = np.fft.irfft(sums.cross[row], n=n_fft)[lags % n_fft]
        want = sum(correlate(d[i, j], d[i, k], mode="full") for i in range(n_shots))
        # complex64 spectra: about 1e-6 relative to the zero-lag energy
        np.testing.assert_allclose(got, want, atol=1e-5 * np.abs(want).max())
        assert sums.count[row] == n_shots


def test_receiver_sums_add_over_disjoint_shot_sets():
    spectra, shot, rcv, pairs, live = _random_survey(seed=4)
    first = np.isin(shot, np.unique(shot)[::2])
    total = receiver_pair_sums(spectra, shot=shot, receiver=rcv, pairs=pairs, live=live)
    parts = [receiver_pair_sums(spectra[m], shot=shot[m], receiver=rcv[m], pairs=pairs, live=live[m])
             for m in (first, ~first)]
    added = parts[0] + parts[1]
    np.testing.assert_array_equal(added.pairs, total.pairs)
    np.testing.assert_array_equal(added.count, total.count)
    # float64 sums of a dozen terms in a different grouping: equal to 1e-12 relative
    for key in ("cross", "power_a", "power_b"):
        np.testing.assert_allclose(getattr(added, key), getattr(total, key), rtol=1e-12, atol=1e-12)


def test_receiver_sums_do_not_depend_on_trace_order():
    spectra, shot, rcv, pairs, live = _random_survey(seed=5)
    base = receiver_pair_sums(spectra, shot=shot, receiver=rcv, pairs=pairs, live=live)
    rng = np.random.default_rng(6)
    for _ in range(3):
        p = rng.permutation(len(shot))
        again = receiver_pair_sums(spectra[p], shot=shot[p], receiver=rcv[p], pairs=pairs[rng.permutation(len(pairs))],
                                   live=live[p])
        _assert_identical(base, again)  # bit-identical: sums always run in shot order


def test_duplicate_receiver_in_a_shot_uses_the_first_trace():
    spectra = np.array([[1 + 0j], [2 + 0j], [3 + 0j], [10 + 0j]], np.complex64)
    sums = receiver_pair_sums(spectra, shot=[7, 7, 7, 7], receiver=[0, 1, 1, 0], pairs=[[0, 1]])
    assert sums.cross[0, 0] == 2 and sums.count[0] == 1  # traces 0 and 1; the later copies are ignored
    sums = receiver_pair_sums(spectra, shot=[7, 7, 7, 7], receiver=[0, 1, 1, 0], pairs=[[0, 1]],
                              live=[False, True, True, True])
    assert sums.cross[0, 0] == 20  # the first live copy of receiver 0 is trace 3


def test_pair_sum_inputs_checked():
    spectra = np.zeros((3, 2), np.complex64)
    with pytest.raises(ConfigError, match="self pair"):
        receiver_pair_sums(spectra, shot=[1, 1, 1], receiver=[0, 1, 2], pairs=[[1, 1]])
    with pytest.raises(ConfigError, match="one per trace"):
        receiver_pair_sums(spectra, shot=[1, 1], receiver=[0, 1, 2], pairs=[[0, 1]])
    empty = receiver_pair_sums(spectra, shot=[1, 2, 3], receiver=[0, 1, 2], pairs=[[0, 1]])
    assert empty.pairs.shape == (0, 2) and empty.cross.shape == (0, 2)


# --------------------------------------------------------------------------- source pair sums


def _source_survey(seed, n_sources=10, n_receivers=12, n_freq=5):
    rng = np.random.default_rng(seed)
    src, rcv = np.nonzero(rng.random((n_sources, n_receivers)) < 0.6)
    order = rng.permutation(len(src))
    src, rcv = src[order].astype(np.int64), rcv[order].astype(np.int64)
    spectra = (rng.standard_normal((len(src), n_freq)) + 1j * rng.standard_normal((len(src), n_freq))).astype(np.complex64)
    pairs = np.array([(a, b) for a in range(n_sources) for b in range(a + 1, n_sources) if b - a <= 3])
    return spectra, src, rcv, pairs, rng.random(len(src)) < 0.9


@pytest.mark.parametrize("block", [512, 5])
def test_source_pair_sums_equal_loop_over_receivers(block, monkeypatch):
    monkeypatch.setattr(pairs_module, "_BLOCK_PRODUCTS", block)
    spectra, src, rcv, pairs, live = _source_survey(7)
    got = source_pair_sums(spectra, shot_source=src, receiver=rcv, pairs=pairs, live=live)
    _assert_sums_equal(got, _loop_pair_sums(spectra, rcv, src, pairs, live))


def test_source_pairs_between_swaths_complete_the_sums_once():
    spectra, src, rcv, pairs, live = _source_survey(8)
    in_a = src < 5  # swath A: source stations 0-4, swath B: 5-9
    a, b = in_a, ~in_a
    kw = lambda m: dict(shot_source=src[m], receiver=rcv[m], live=live[m])  # noqa: E731
    within_a = source_pair_sums(spectra[a], pairs=pairs, **kw(a))
    within_b = source_pair_sums(spectra[b], pairs=pairs, **kw(b))
    between = source_pair_sums_between(spectra[a], spectra[b], shot_source_a=src[a], receiver_a=rcv[a],
                                       live_a=live[a], shot_source_b=src[b], receiver_b=rcv[b], live_b=live[b],
                                       pairs=pairs)
    # only pairs with one source station in each swath
    assert np.all((between.pairs[:, 0] < 5) & (between.pairs[:, 1] >= 5))
    together = source_pair_sums(spectra, shot_source=src, receiver=rcv, pairs=pairs, live=live)
    added = within_a + within_b + between
    np.testing.assert_array_equal(added.pairs, together.pairs)
    np.testing.assert_array_equal(added.count, together.count)
    np.testing.assert_allclose(added.cross, together.cross, rtol=1e-12, atol=1e-12)
    # the between sums of B with A are the same sums (rows are always (low, high))
    swapped = source_pair_sums_between(spectra[b], spectra[a], shot_source_a=src[b], receiver_a=rcv[b],
                                       live_a=live[b], shot_source_b=src[a], receiver_b=rcv[a], live_b=live[a],
                                       pairs=pairs)
    np.testing.assert_array_equal(swapped.pairs, between.pairs)
    np.testing.assert_allclose(swapped.cross, between.cross, rtol=1e-12)


# --------------------------------------------------------------------------- end to end on the synthetic survey


@pytest.fixture(scope="module")
def statics_survey():
    spec = synthetic_spec(size="tiny", scenario="statics")
    tables = stations(spec)
    truth = station_truth(spec, tables)
    geos = [swath_traces(spec, s, tables) for s in range(spec.n_swaths)]
    traces = np.concatenate([synthesize(spec, truth, g) for g in geos])
    cat = lambda name: np.concatenate([getattr(g, name) for g in geos])  # noqa: E731
    rx, ry, sx, sy = cat("receiver_x"), cat("receiver_y"), cat("source_x"), cat("source_y")
    receiver, table = assign_stations(station_keys(rx, ry, snap_m=1.0), np.zeros(0, np.int64))
    shot = shot_ids(cat("field_record"), station_keys(sx, sy, snap_m=1.0))
    station_x, station_y = np.zeros(len(table)), np.zeros(len(table))
    station_x[receiver], station_y[receiver] = rx, ry
    truth_row = np.zeros(len(table), np.int64)
    truth_row[receiver] = cat("receiver_index")
    vt, vv = np.asarray(spec.velocity).T
    n_fft = 256
    spectra = windowed_spectra(traces, offset_m=cat("offset"), delay_s=0.0, dt_s=spec.dt_s, velocity_t0_s=vt,
                               velocity_vrms_mps=vv, window_s=spec.window_s, taper_s=0.05, stretch_mute=0.5,
                               n_fft=n_fft, band_hz=spec.band_hz)
    freqs, _ = band_frequencies(n_fft=n_fft, dt_s=spec.dt_s, band_hz=spec.band_hz)
    return dict(spec=spec, spectra=spectra, shot=shot, receiver=receiver, x=station_x, y=station_y,
                static=truth.receivers.static_s[truth_row], freqs=freqs)


def test_receiver_cross_phase_follows_true_statics(statics_survey):
    s = statics_survey
    pairs = neighbour_pairs(s["x"], s["y"], radius_m=s["spec"].receiver_pair_radius_m)
    sums = receiver_pair_sums(s["spectra"], shot=s["shot"], receiver=s["receiver"], pairs=pairs)
    assert graph_components(len(s["x"]), sums.pairs)[0] == 1  # the radius joins the receiver lines
    assert len(sums.pairs) == len(pairs) and np.all(sums.count == 24)  # every receiver live in all 24 shots
    true = s["static"][sums.pairs[:, 0]] - s["static"][sums.pairs[:, 1]]
    f, x = s["freqs"], sums.cross
    # X_jk = D_j conj(D_k) has phase -2 pi f (tau_j - tau_k) (positive static = late): the
    # |X|-weighted least-squares slope of the phase left after removing the true shift is near zero
    w = np.abs(x)
    residual = np.angle(x * np.exp(2j * np.pi * f * true[:, None]))
    slope_error = -(w * f * residual).sum(axis=1) / (2 * np.pi * (w * f**2).sum(axis=1))
    # a truth-free check: the lag of the peak of the band-limited summed cross-correlation
    lags = np.arange(-0.03, 0.03, 2e-5)
    peak = lags[np.argmax(np.real(x @ np.exp(2j * np.pi * np.outer(f, lags))), axis=1)]
    assert np.std(true) > 4e-3  # static differences of several ms to recover
    for estimate in (true + slope_error, peak):
        err = estimate - true
        # tolerance: 0.25 ms rms and 1.2 ms worst over 554 pairs (measured 0.10 ms and, with the
        # survey's window starting at 0.07 s, 0.94 ms worst). NMO stretches a pre-moveout static
        # by t / t0, most at early times and far offsets, and 24 shots leave some
        # earth-response difference between neighbours in the phase
        assert np.sqrt(np.mean(err**2)) < 2.5e-4
        assert np.abs(err).max() < 1.2e-3
        assert np.polyfit(true, estimate, 1)[0] == pytest.approx(1.0, abs=0.05)


# --------------------------------------------------------------------------- smoothing over frequency


def _smooth_reference(x, bin_hz, half):
    """A loop over bins with the kernel written out (module docstring of the kernel)."""
    n = x.shape[-1]
    out = np.zeros_like(x)
    for m in range(n):
        room = min(m, n - 1 - m)
        num, den = 0.0, 0.0
        for k in range(-room, room + 1):
            w = 1.0 - abs(k) * bin_hz / half
            if w > 0:
                num = num + w * x[..., m + k]
                den += w
        out[..., m] = num / den
    return out


@pytest.mark.parametrize("half", [0.5, 1.0, 2.0, 2.3, 4.0])
def test_smooth_over_frequency_matches_a_loop(half):
    from descatter.tasks.pairs import smooth_over_frequency

    rng = np.random.default_rng(5)
    x = rng.normal(size=(3, 17)) + 1j * rng.normal(size=(3, 17))
    got = smooth_over_frequency(x, bin_hz=0.5, half_width_hz=half)
    np.testing.assert_allclose(got, _smooth_reference(x, 0.5, half), rtol=1e-12, atol=1e-12)
    real = smooth_over_frequency(x.real, bin_hz=0.5, half_width_hz=half)
    assert real.dtype == np.float64
    np.testing.assert_allclose(real, got.real, atol=1e-12)


def test_smooth_over_frequency_keeps_a_linear_phase_and_adds_up():
    from descatter.tasks.pairs import smooth_over_frequency, smooth_pair_sums

    f = 10.0 + 0.5 * np.arange(60)
    tau = np.array([0.0, 0.004, -0.011, 0.02])[:, None]
    x = np.exp(-2j * np.pi * f * tau)
    y = smooth_over_frequency(x, bin_hz=0.5, half_width_hz=2.0)
    # a symmetric kernel scales exp(-2 pi i f tau) by a real positive factor at every bin
    np.testing.assert_allclose(np.angle(y * np.conj(x)), 0.0, atol=1e-12)
    assert np.all(np.abs(y[1:, 1:-1]) < 1.0) and np.allclose(np.abs(y[:, [0, -1]]), 1.0)  # edges kept
    rng = np.random.default_rng(2)
    parts = []
    for _ in range(2):
        c = rng.normal(size=(5, 60)) + 1j * rng.normal(size=(5, 60))
        parts.append(PairSums(np.array([[0, 1], [0, 2], [1, 2], [1, 3], [2, 3]]), c, np.abs(c) ** 2,
                              np.abs(c) ** 2 + 1, np.full(5, 3)))
    both = smooth_pair_sums(parts[0] + parts[1], bin_hz=0.5, half_width_hz=2.0)
    each = smooth_pair_sums(parts[0], bin_hz=0.5, half_width_hz=2.0) + smooth_pair_sums(parts[1], bin_hz=0.5,
                                                                                          half_width_hz=2.0)
    np.testing.assert_allclose(both.cross, each.cross, rtol=1e-12)
    np.testing.assert_allclose(both.power_a, each.power_a, rtol=1e-12)
    np.testing.assert_allclose(both.power_b, each.power_b, rtol=1e-12)
    assert np.array_equal(both.count, each.count)
    with pytest.raises(ConfigError, match="half-width"):
        smooth_over_frequency(x, bin_hz=0.0, half_width_hz=2.0)
