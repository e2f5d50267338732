"""Numbers behind the QC report (pure numpy / scipy).

- :func:`analysis_traces`: traces as the estimation sees them, moveout
  corrected and band limited, for semblance, correlations and spectra;
  :func:`batch_quality`: per-shot semblance, per-CMP-bin sums and the
  spectrum sum of one batch of whole shots; :func:`cmp_bin_keys`.
- :func:`pair_crosscorrelation`: normalised cross-correlation of two traces
  per row (the per-shot correlation of a receiver pair).
- :func:`semblance_sums` / :func:`merge_semblance_sums` /
  :func:`semblance_from_sums`: the semblance of
  :func:`descatter.tasks.quality.grouped_semblance` split into additive
  parts, so a group (a CMP bin) may gather traces from several batches.
- :func:`group_signal_to_noise`, :func:`snr_gain_db`: S/N per group and its
  change.
- :func:`even_shot_sample`, :func:`extreme_station_pairs`,
  :func:`upper_quantile_mask`, :func:`row_repeatability`,
  :func:`nyquist_spacing_curve`: selections and summaries.
- Comparison with a synthetic survey's truth: :func:`match_stations` (the
  store's stations in the truth's tables), :func:`truth_clean_traces` (the
  same traces without station filters and noise; :func:`batch_quality`
  correlates them with the traces in the analysis band and window) and
  :func:`distribution_summary`.
"""

from __future__ import annotations

import numpy as np
import scipy.fft as sfft
from scipy.spatial import cKDTree

from . import synthetic
from .errors import ConfigError, GeometryError
from .moveout import lmo_correct, nmo_correct
from .quality import (
    amplitude_spectrum, bandpass, cmp_bin_indices, grouped_semblance, signal_to_noise, zero_lag_correlation,
)


def analysis_traces(
    traces,
    *,
    offset_m,
    delay_s,
    dt_s: float,
    band_hz: tuple[float, float] | None,
    band_taper_hz: float = 0.0,
    moveout: str = "nmo",
    velocity_t0_s=None,
    velocity_vrms_mps=None,
    stretch_mute: float | None = None,
    lmo_velocity_mps: float | None = None,
    window_weights: np.ndarray | None = None,
) -> np.ndarray:
    """Moveout-corrected, zero-phase band-limited traces on the t0 axis.

    traces float32 [n, ns] (input sample ``k`` at ``delay_s[i] + k dt_s``);
    offset_m float [n]; delay_s float [n] or scalar. ``moveout="nmo"``:
    :func:`~descatter.tasks.moveout.nmo_correct` with the velocity function
    and ``stretch_mute``; ``"lmo"``: :func:`~descatter.tasks.moveout.lmo_correct`
    at ``lmo_velocity_mps``. Then :func:`~descatter.tasks.quality.bandpass`
    over ``band_hz`` with raised-cosine flanks of ``band_taper_hz`` (a
    taper of 0 is taken as 1e-6 Hz, a sharp edge); ``band_hz=None`` leaves
    the moveout-corrected traces unfiltered (as float64). Last, each trace
    is multiplied by ``window_weights`` float [ns] if given (the analysis
    window taper of :func:`~descatter.tasks.moveout.window_taper`). Returns
    float64 [n, ns], sample ``k`` at ``t0 = k dt_s``.
    """
    if moveout == "nmo":
        if velocity_t0_s is None or velocity_vrms_mps is None:
            raise ConfigError("moveout = 'nmo' needs velocity_t0_s and velocity_vrms_mps")
        flat = nmo_correct(traces, offset_m=offset_m, delay_s=delay_s, dt_s=dt_s, velocity_t0_s=velocity_t0_s,
                           velocity_vrms_mps=velocity_vrms_mps, stretch_mute=stretch_mute)
    elif moveout == "lmo":
        if lmo_velocity_mps is None:
            raise ConfigError("moveout = 'lmo' needs lmo_velocity_mps")
        flat = lmo_correct(traces, offset_m=offset_m, delay_s=delay_s, dt_s=dt_s, velocity_mps=lmo_velocity_mps)
    else:
        raise ConfigError(f"moveout = {moveout!r}: expected 'nmo' or 'lmo'")
    out = flat.astype(np.float64) if band_hz is None else \
        bandpass(flat, dt_s=dt_s, band_hz=band_hz, taper_hz=max(float(band_taper_hz), 1e-6))
    if window_weights is not None:
        out *= _weights(window_weights, out.shape[1])
    return out


def _weights(window_weights, ns: int) -> np.ndarray:
    w = np.asarray(window_weights, np.float64).reshape(-1)
    if w.shape != (ns,):
        raise ConfigError(f"window_weights has {w.size} values for traces of {ns} samples: expected one per sample")
    return w


def batch_quality(
    flat: np.ndarray, *, shots: np.ndarray, cmp_keys: np.ndarray, dt_s: float, band_hz: tuple[float, float],
    band_taper_hz: float, start: int, stop: int, window_weights: np.ndarray, truth: np.ndarray | None = None,
) -> dict:
    """QC numbers of one batch of whole shots of moveout-corrected traces.

    flat float [n, ns] (:func:`analysis_traces` with ``band_hz=None``);
    shots int [n] and cmp_keys int [n] (:func:`cmp_bin_keys`) per trace;
    ``start:stop`` the analysis window in samples; window_weights float [ns];
    truth: optional float [n, ns], the clean truth of each trace
    (:func:`truth_clean_traces`) moveout corrected and band limited alike
    (:func:`analysis_traces` with the same band and flanks).
    Returns a dict:

    - ``shot``, ``semblance``, ``count``: :func:`~descatter.tasks.quality.grouped_semblance`
      per shot of the band-limited traces (``bandpass`` over ``band_hz``, flanks
      ``band_taper_hz``) over the window;
    - ``cmp``: :func:`semblance_sums` of the same traces per CMP bin (add
      batches with :func:`merge_semblance_sums`);
    - ``freqs_hz`` float64 [n_fft // 2 + 1] and ``spectrum_sum``: the sum over
      traces of ``|rfft|`` of the windowed, not band-limited traces
      (:func:`~descatter.tasks.quality.amplitude_spectrum` times ``n``);
    - with ``truth``, ``truth_correlation`` float64 [n]: the zero-lag
      correlation of each band-limited trace ``a`` with its truth ``b`` over
      the window, ``sum_t a b / sqrt(sum_t a^2 sum_t b^2)``
      (:func:`~descatter.tasks.quality.zero_lag_correlation`; no shift or
      scale fitted, 0 where either has no energy there).
    """
    x = np.asarray(flat, np.float64)
    freqs, mean_spectrum = amplitude_spectrum(x * _weights(window_weights, x.shape[1]), dt_s=dt_s)
    limited = bandpass(x, dt_s=dt_s, band_hz=band_hz, taper_hz=max(float(band_taper_hz), 1e-6))
    labels, s, count = grouped_semblance(limited, shots, start=start, stop=stop)
    out = {"shot": labels, "semblance": s, "count": count,
           "cmp": semblance_sums(limited, cmp_keys, start=start, stop=stop),
           "freqs_hz": freqs, "spectrum_sum": mean_spectrum * x.shape[0]}
    if truth is not None:
        b = np.asarray(truth, np.float64)
        if b.shape != x.shape:
            raise ConfigError(f"truth has shape {b.shape}: expected one clean trace per trace, {x.shape}")
        out["truth_correlation"] = zero_lag_correlation(limited, b, start=start, stop=stop)
    return out


def cmp_bin_keys(cmp_x: np.ndarray, cmp_y: np.ndarray, *, bin_m: tuple[float, float],
                 origin: tuple[float, float]) -> np.ndarray:
    """One int64 key per trace for its CMP bin of
    :func:`~descatter.tasks.quality.cmp_bin_indices`:
    ``ix * 2**32 + (iy + 2**31)`` (sorts by ix, then iy). Inverse:
    :func:`cmp_bin_centres`."""
    b = cmp_bin_indices(cmp_x, cmp_y, bin_m=bin_m, origin=origin)
    return b[:, 0] * 2**32 + (b[:, 1] + 2**31)


def cmp_bin_centres(keys: np.ndarray, *, bin_m: tuple[float, float], origin: tuple[float, float]):
    """``(ix, iy, x, y)`` of bin keys of :func:`cmp_bin_keys`: the bin
    numbers (int64 [k]) and the bin centres in metres (float64 [k])."""
    k = np.asarray(keys, np.int64)
    ix, iy = k // 2**32, k % 2**32 - 2**31
    return ix, iy, origin[0] + (ix + 0.5) * bin_m[0], origin[1] + (iy + 0.5) * bin_m[1]


def pair_crosscorrelation(a: np.ndarray, b: np.ndarray, *, max_lag: int) -> np.ndarray:
    """Normalised cross-correlation of each row of ``a`` with the same row of ``b``.

    a, b: float [n, ns]. Returns float64 [n, 2 max_lag + 1], column
    ``max_lag + k`` for lag ``k = -max_lag .. max_lag`` samples::

        c_i(k) = sum_t a_i(t + k) b_i(t) / sqrt(sum_t a_i(t)^2 sum_t b_i(t)^2)

    (``scipy.signal.correlate(a_i, b_i, mode="full")`` at index
    ``k + ns - 1``, normalised), so a peak at ``k > 0`` means ``a`` arrives
    ``k`` samples after ``b``. Rows where either trace has no energy are 0.
    Computed by FFT of length ``>= ns + max_lag``, long enough that the
    kept lags do not wrap.
    """
    x = np.asarray(a, dtype=np.float64)
    y = np.asarray(b, dtype=np.float64)
    if x.ndim != 2 or x.shape != y.shape:
        raise ConfigError(f"a {x.shape} and b {y.shape}: expected two arrays of one shape [n, n_samples]")
    max_lag = int(max_lag)
    if max_lag < 0:
        raise ConfigError(f"max_lag = {max_lag}: expected a lag of at least 0 samples")
    n, ns = x.shape
    n_fft = sfft.next_fast_len(ns + max_lag, real=True)
    circ = sfft.irfft(sfft.rfft(x, n_fft, axis=-1) * np.conj(sfft.rfft(y, n_fft, axis=-1)), n_fft, axis=-1)
    lags = np.arange(-max_lag, max_lag + 1)
    c = circ[:, lags % n_fft]
    c[:, np.abs(lags) >= ns] = 0.0  # no overlap at these lags
    norm = np.sqrt(np.sum(x**2, axis=1) * np.sum(y**2, axis=1))
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(norm[:, None] > 0, c / np.where(norm > 0, norm, 1.0)[:, None], 0.0)


def row_repeatability(rows: np.ndarray) -> float:
    """How alike the rows are: the mean over rows of the zero-lag normalised
    correlation of each row with the sum of the other rows.

    rows: float [n, m]. Returns a float in [-1, 1]; NaN for fewer than two
    rows. 1 when every row has one shape (a distortion repeated shot after
    shot), near 0 for independent rows.
    """
    r = np.asarray(rows, dtype=np.float64)
    if r.ndim != 2:
        raise ConfigError(f"rows has shape {r.shape}: expected [n_rows, n_values]")
    if r.shape[0] < 2:
        return float("nan")
    others = r.sum(axis=0)[None, :] - r
    return float(np.mean(zero_lag_correlation(r, others)))


def mean_row_peak(rows: np.ndarray) -> tuple[float, int]:
    """``(value, column)`` of the maximum of the mean row: the peak of a
    pair's correlation stacked over shots. rows float [n >= 1, m]."""
    r = np.asarray(rows, dtype=np.float64)
    if r.ndim != 2 or r.shape[0] == 0 or r.shape[1] == 0:
        raise ConfigError(f"rows has shape {r.shape}: expected [n_rows >= 1, n_values >= 1]")
    mean = r.mean(axis=0)
    at = int(np.argmax(mean))
    return float(mean[at]), at


def semblance_sums(traces: np.ndarray, groups: np.ndarray, *, start: int, stop: int):
    """Additive parts of the window semblance of every group of traces.

    traces float [n, ns]; groups int [n], a label per trace. Returns
    ``(labels int64 [k] sorted, stack float64 [k, stop - start], energy
    float64 [k], count int64 [k])``: per group, the sum of its traces over
    samples ``start:stop``, the sum of their squares, and their number.
    Parts of one group from several calls add (:func:`merge_semblance_sums`);
    :func:`semblance_from_sums` turns them into the semblance of
    :func:`descatter.tasks.quality.grouped_semblance`.
    """
    a = np.asarray(traces, dtype=np.float64)
    g = np.asarray(groups).reshape(-1)
    if a.ndim != 2 or g.shape != (a.shape[0],):
        raise ConfigError(f"traces {a.shape} and groups {g.shape}: expected [n, n_samples] and one label per trace")
    if not 0 <= start < stop <= a.shape[1]:
        raise ConfigError(f"window start = {start}, stop = {stop}: expected 0 <= start < stop <= {a.shape[1]}")
    labels, where = np.unique(g, return_inverse=True)
    where = where.reshape(-1)
    w = a[:, start:stop]
    stack = np.zeros((len(labels), stop - start))
    np.add.at(stack, where, w)
    energy = np.bincount(where, weights=np.sum(w**2, axis=1), minlength=len(labels))
    count = np.bincount(where, minlength=len(labels))
    return labels.astype(np.int64), stack, energy, count.astype(np.int64)


def merge_semblance_sums(parts):
    """Sum several :func:`semblance_sums` results (an iterable of 4-tuples)
    group by group. Returns one 4-tuple in the same layout."""
    parts = [p for p in parts if len(p[0])]
    if not parts:
        return np.zeros(0, np.int64), np.zeros((0, 0)), np.zeros(0), np.zeros(0, np.int64)
    labels_all = np.concatenate([p[0] for p in parts])
    labels, where = np.unique(labels_all, return_inverse=True)
    where = where.reshape(-1)
    stack = np.zeros((len(labels), parts[0][1].shape[1]))
    np.add.at(stack, where, np.concatenate([p[1] for p in parts]))
    energy = np.bincount(where, weights=np.concatenate([p[2] for p in parts]), minlength=len(labels))
    count = np.bincount(where, weights=np.concatenate([p[3] for p in parts]), minlength=len(labels))
    return labels, stack, energy, count.astype(np.int64)


def semblance_from_sums(stack: np.ndarray, energy: np.ndarray, count: np.ndarray) -> np.ndarray:
    """``S = sum_t stack(t)^2 / (N energy)`` per group, in [0, 1]; 0 without
    energy. stack float [k, m], energy float [k], count int [k]. Returns
    float64 [k]."""
    num = np.sum(np.asarray(stack, np.float64) ** 2, axis=1)
    den = np.asarray(count, np.float64) * np.asarray(energy, np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        s = np.where(den > 0, num / np.where(den > 0, den, 1.0), 0.0)
    return np.minimum(s, 1.0)


def group_signal_to_noise(s: np.ndarray, count: np.ndarray) -> np.ndarray:
    """:func:`~descatter.tasks.quality.signal_to_noise` of each group's
    semblance with its own trace count ``N``: ``(N s - 1) / (N (1 - s))``,
    0 for ``s <= 1/N``, ``inf`` at ``s = 1``. s float [k], count int [k].
    Returns float64 [k]."""
    s = np.asarray(s, np.float64).reshape(-1)
    n = np.asarray(count, np.int64).reshape(-1)
    if s.shape != n.shape:
        raise ConfigError(f"s {s.shape} and count {n.shape}: expected one trace count per semblance")
    out = np.zeros(len(s))
    for c in np.unique(n[n >= 1]):  # one call per distinct count, not per group
        at = n == c
        out[at] = signal_to_noise(s[at], n_traces=int(c))
    return out


def snr_gain_db(before: np.ndarray, after: np.ndarray, *, floor: float = 1e-3, ceiling: float = 1e6) -> np.ndarray:
    """Change of a power S/N in decibels, ``10 log10(after / before)``, each
    clipped to ``[floor, ceiling]`` first (an S/N of 0 or ``inf`` from a
    semblance of ``<= 1/N`` or 1 would otherwise have no finite ratio).
    Returns float64, the broadcast shape."""
    if not 0 < floor < ceiling:
        raise ConfigError(f"floor = {floor}, ceiling = {ceiling}: expected 0 < floor < ceiling")
    b = np.clip(np.asarray(before, np.float64), floor, ceiling)
    a = np.clip(np.asarray(after, np.float64), floor, ceiling)
    return 10.0 * np.log10(a / b)


def even_shot_sample(trace_counts: np.ndarray, *, max_traces: int) -> np.ndarray:
    """Shots to read when only ``max_traces`` traces may be: all of them if
    they fit, otherwise shots spread evenly over the given order.

    trace_counts int [n_shots] (in survey order). Returns int64 sorted shot
    positions whose counts sum to at most ``max_traces`` (at least one shot,
    even if it alone is larger).
    """
    counts = np.asarray(trace_counts, np.int64).reshape(-1)
    if max_traces < 1:
        raise ConfigError(f"max_traces = {max_traces}: expected at least 1 trace")
    n = len(counts)
    if n == 0 or counts.sum() <= max_traces:
        return np.arange(n, dtype=np.int64)
    k = max(1, min(n, int(max_traces // max(counts.mean(), 1))))
    while True:
        chosen = np.unique(np.floor((np.arange(k) + 0.5) * n / k).astype(np.int64))
        if k == 1 or counts[chosen].sum() <= max_traces:
            return chosen
        k -= 1


def extreme_station_pairs(
    values: np.ndarray, x: np.ndarray, y: np.ndarray, *, eligible: np.ndarray, n_low: int = 2, n_high: int = 2,
    reach: float = 1.5,
) -> list[tuple[int, int, str]]:
    """Station pairs for correlation panels: the ``n_low`` stations of
    lowest and the ``n_high`` of highest ``values`` (among ``eligible``),
    each with a close eligible neighbour, no pair twice.

    The neighbour is chosen among the eligible stations within ``reach``
    times the distance to the nearest one (the stations on either side
    along a line): the lowest value of them for a low pair, the highest for
    a high pair, so each pair shows one end of the range at both stations.
    values, x, y float [n]; eligible bool [n]. Returns
    ``[(station, neighbour, "low" | "high"), ...]`` of row indices, lows
    first (lowest first), then highs (highest first). Fewer pairs when there
    are fewer than two eligible stations.
    """
    v = np.asarray(values, np.float64).reshape(-1)
    ok = np.asarray(eligible, bool).reshape(-1) & np.isfinite(v)
    idx = np.flatnonzero(ok)
    if idx.size < 2:
        return []
    pts = np.column_stack([np.asarray(x, np.float64)[idx], np.asarray(y, np.float64)[idx]])
    tree = cKDTree(pts)
    order = idx[np.argsort(v[idx], kind="stable")]
    out: list[tuple[int, int, str]] = []
    seen: set[frozenset] = set()
    for group, picks, n_pick, sign in (("low", order, n_low, 1.0), ("high", order[::-1], n_high, -1.0)):
        taken = 0
        for j in picks:
            if taken >= n_pick:
                break
            p = pts[np.searchsorted(idx, j)]
            nearest = tree.query(p, k=2)[0][1]
            near = [int(idx[m]) for m in tree.query_ball_point(p, r=reach * nearest * (1 + 1e-9))]
            near = [m for m in near if m != j and frozenset((int(j), m)) not in seen]
            if not near:
                continue
            other = min(near, key=lambda m: (sign * v[m], m))
            seen.add(frozenset((int(j), other)))
            out.append((int(j), other, group))
            taken += 1
    return out


def upper_quantile_mask(values: np.ndarray, *, eligible: np.ndarray,
                        quantile: float = 0.75) -> tuple[float, np.ndarray]:
    """``(threshold, mask)``: the ``quantile`` of ``values`` over the
    eligible entries (numpy's linear interpolation), and which eligible
    entries reach it. values float [n], eligible bool [n]. NaN threshold and
    an all-false mask when nothing is eligible."""
    v = np.asarray(values, np.float64).reshape(-1)
    ok = np.asarray(eligible, bool).reshape(-1) & np.isfinite(v)
    if not 0 <= quantile <= 1:
        raise ConfigError(f"quantile = {quantile}: expected a fraction in [0, 1]")
    if not ok.any():
        return float("nan"), np.zeros(v.shape, bool)
    threshold = float(np.quantile(v[ok], quantile))
    return threshold, ok & (v >= threshold)


def nyquist_spacing_curve(freqs_hz: np.ndarray, velocities_mps: np.ndarray) -> np.ndarray:
    """Largest unaliased station spacing ``v / (2 f)`` (m), half the
    near-surface wavelength. freqs_hz float [m] > 0, velocities_mps float
    [k]. Returns float64 [k, m]."""
    f = np.asarray(freqs_hz, np.float64).reshape(-1)
    v = np.asarray(velocities_mps, np.float64).reshape(-1)
    if np.any(f <= 0) or np.any(v <= 0):
        raise ConfigError("frequencies and velocities must be positive")
    return v[:, None] / (2.0 * f[None, :])


# --------------------------------------------------------------------------- comparison with a synthetic truth

# truth arrays (tasks.synthetic.TRUTH_KEYS) the clean traces are made from
CLEAN_TRUTH_KEYS = (
    "source_x", "source_y", "receiver_x", "receiver_y", "source_filter", "receiver_filter", "filter_t0_s", "dt_s",
    "velocity_t0_s", "velocity_vrms_mps", "reflector_t0_s", "reflector_amplitude", "peak_hz", "scenario", "seed",
)


def match_stations(x: np.ndarray, y: np.ndarray, *, reference_x: np.ndarray, reference_y: np.ndarray,
                   tolerance_m: float) -> np.ndarray:
    """Row of the nearest reference station for each station, by position.

    x, y float [n]; reference_x, reference_y float [m] (m). Returns int64
    [n]: the reference row nearest to each station, -1 where none lies
    within ``tolerance_m`` (or there are no reference stations).
    """
    px = np.column_stack([np.asarray(x, np.float64).reshape(-1), np.asarray(y, np.float64).reshape(-1)])
    ref = np.column_stack([np.asarray(reference_x, np.float64).reshape(-1),
                           np.asarray(reference_y, np.float64).reshape(-1)])
    if not tolerance_m >= 0:
        raise ConfigError(f"tolerance_m = {tolerance_m}: expected a distance >= 0 m")
    if len(ref) == 0 or len(px) == 0:
        return np.full(len(px), -1, np.int64)
    distance, row = cKDTree(ref).query(px)
    return np.where(distance <= tolerance_m, row, -1).astype(np.int64)


def truth_clean_traces(truth: dict, source_rows: np.ndarray, receiver_rows: np.ndarray, *,
                       n_samples: int) -> np.ndarray:
    """The clean traces of a synthetic survey: its earth response without
    station filters and without noise, for any traces of it.

    truth: the arrays of a synthetic truth file (:data:`descatter.tasks.synthetic.TRUTH_KEYS`;
    those of :data:`CLEAN_TRUTH_KEYS` are used); source_rows, receiver_rows
    int [n]: rows of the truth's station tables (see :func:`match_stations`).
    Returns float32 [n, n_samples], sample k at time k * dt_s:
    :func:`descatter.tasks.synthetic.synthesize` with ``station_filters=False,
    noise=False`` (the reflections through the Ricker wavelet at their
    hyperbolic moveout times, offsets from the truth's station positions),
    the same samples as the truth's own ``clean`` traces.
    """
    missing = [k for k in CLEAN_TRUTH_KEYS if k not in truth]
    if missing:
        raise ConfigError(f"the synthetic truth lacks {', '.join(missing)}: expected the keys of "
                          f"descatter.tasks.synthetic.TRUTH_KEYS (write it with 'descatter synth')")
    src = np.asarray(source_rows, np.int64).reshape(-1)
    rcv = np.asarray(receiver_rows, np.int64).reshape(-1)
    for name, rows, kind in (("source_rows", src, "source"), ("receiver_rows", rcv, "receiver")):
        n = len(truth[f"{kind}_x"])
        if rows.size and (rows.min() < 0 or rows.max() >= n):
            raise GeometryError(f"{name} spans {rows.min()}..{rows.max()}: expected rows 0..{n - 1} of the "
                                f"truth's {kind} stations")
    dt = float(truth["dt_s"])
    n_filter = np.asarray(truth["source_filter"]).shape[1]
    spec = synthetic.SyntheticSpec(
        scenario=str(truth["scenario"]), seed=int(truth["seed"]), n_samples=int(n_samples), dt_s=dt,
        velocity=tuple(zip(np.asarray(truth["velocity_t0_s"], float).tolist(),
                           np.asarray(truth["velocity_vrms_mps"], float).tolist())),
        reflectors=tuple(zip(np.asarray(truth["reflector_t0_s"], float).tolist(),
                             np.asarray(truth["reflector_amplitude"], float).tolist())),
        peak_hz=float(truth["peak_hz"]), filter_lead_s=-float(truth["filter_t0_s"]),
        filter_length_s=n_filter * dt, static_limit_s=0.0,  # statics play no part in clean traces
    )
    stations = {}
    for kind in synthetic.KINDS:
        x, y = np.asarray(truth[f"{kind}_x"], float), np.asarray(truth[f"{kind}_y"], float)
        zero = np.zeros(len(x))
        stations[kind] = synthetic.FilterTruth(filter=np.asarray(truth[f"{kind}_filter"], float), static_s=zero,
                                               log_amplitude=zero, scattering_fraction=zero, x=x, y=y)
    station_truth = synthetic.StationTruth(sources=stations["source"], receivers=stations["receiver"],
                                           filter_t0_s=float(truth["filter_t0_s"]), dt_s=dt)
    return synthetic.synthesize(spec, station_truth, src, rcv, station_filters=False, noise=False)


def distribution_summary(values: np.ndarray, *, edges: np.ndarray) -> dict:
    """Count, mean, median and quartiles and deciles of the finite
    ``values`` (numpy's linear-interpolation quantiles), and their histogram
    over ``edges`` (``numpy.histogram``: bins closed on the left, the last
    one on both sides). values float [n]; edges float [k + 1], increasing.
    Returns a dict of plain numbers (NaN statistics when nothing is finite)
    and ``counts`` int64 [k]."""
    v = np.asarray(values, np.float64).reshape(-1)
    v = v[np.isfinite(v)]
    e = np.asarray(edges, np.float64).reshape(-1)
    if e.size < 2 or np.any(np.diff(e) <= 0):
        raise ConfigError(f"edges has {e.size} values: expected at least two, strictly increasing")
    q = np.quantile(v, [0.1, 0.25, 0.5, 0.75, 0.9]) if v.size else np.full(5, np.nan)
    return {"count": int(v.size), "mean": float(v.mean()) if v.size else float("nan"),
            "median": float(q[2]), "q10": float(q[0]), "q25": float(q[1]), "q75": float(q[3]), "q90": float(q[4]),
            "edges": e, "counts": np.histogram(v, bins=e)[0].astype(np.int64)}
