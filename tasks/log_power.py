"""Log power spectra and the sums of the surface-consistent amplitude solve.

Per trace ``L_ij(f) = log |D_ij(f)|^2`` (natural log), modelled per
frequency as ``s_i + r_j + o_h (+ c_m)`` (Taner & Koehler 1981; Cary &
Lorentz 1993): source station ``i``, receiver station ``j``, offset bin
``h`` and optionally CMP bin ``m``. Its least-squares normal equations
``A^T A u = A^T L`` (``A`` the 0/1 design matrix, one column per term) need
only sums over traces: per term the sum of ``L`` and the trace count (the
diagonal of ``A^T A``), and between two kinds of term the count of traces
they share (the off-diagonal blocks). :func:`log_power_sums` returns them as
:class:`~descatter.tasks.statistics.LogPowerSums`, additive over traces.
"""

from __future__ import annotations

import numpy as np
from scipy.sparse import csr_matrix

from .errors import ConfigError
from .statistics import LogPowerSums

#: term kinds in the order of the design matrix's column blocks
KINDS = ("source", "receiver", "offset", "cmp")


def log_power(spectra, *, floor: float = 1e-6) -> np.ndarray:
    """``L = log(max(|D|^2, floor * mean_f |D|^2))`` per trace and frequency.

    spectra complex [n, n_freq]. The floor is relative to the trace's mean
    power over the band, so a notch (an exact zero bin) gives
    ``log(floor) + log(mean power)`` instead of ``-inf``, about 14 below
    the trace's typical level for the default 1e-6 (60 dB). A trace with
    zero power in every bin (dead) gives 0 in every bin; mark it not live
    before :func:`log_power_sums`. Returns float64 [n, n_freq].
    """
    if not (np.isfinite(floor) and floor > 0):
        raise ConfigError(f"floor = {floor}: expected a relative power floor > 0 (for example 1e-6)")
    s = np.asarray(spectra)
    if s.ndim != 2:
        raise ConfigError(f"spectra: got shape {s.shape}; expected [n_traces, n_freq]")
    s = s.astype(np.complex128, copy=False)
    power = s.real**2 + s.imag**2
    mean = power.mean(axis=1, keepdims=True) if power.shape[1] else np.zeros((len(power), 1))
    dead = mean[:, 0] <= 0
    np.maximum(power, floor * mean, out=power)
    power[dead] = 1.0
    return np.log(power, out=power)


def offset_bins(offset_m, *, bin_m: float) -> np.ndarray:
    """Offset bin per trace: ``h = floor(|x| / bin_m)``, bin ``h`` covering
    ``[h bin_m, (h + 1) bin_m)``. offset_m float [n] (the sign is ignored).
    Returns int64 [n]."""
    if not (np.isfinite(bin_m) and bin_m > 0):
        raise ConfigError(f"bin_m = {bin_m}: expected an offset bin width > 0 in metres")
    x = np.abs(np.asarray(offset_m, dtype=np.float64))
    if not np.all(np.isfinite(x)):
        raise ConfigError("offset_m holds a non-finite offset; mark such traces not live and give them offset 0")
    return np.floor(x / bin_m).astype(np.int64)


def _indices(name: str, value, n: int, size: int) -> np.ndarray:
    idx = np.asarray(value, dtype=np.int64).ravel()
    if idx.size != n:
        raise ConfigError(f"{name}: got {idx.size} values for {n} traces; expected one per trace")
    if idx.size and (idx.min() < 0 or idx.max() >= size):
        raise ConfigError(
            f"{name}: indices span [{int(idx.min())}, {int(idx.max())}] but there are {size} terms; "
            f"expected 0 <= index < {size} (raise the count or fix the index)"
        )
    return idx


def _cross_counts(a: np.ndarray, b: np.ndarray, n_b: int) -> np.ndarray:
    """Rows (index a, index b, count), int64 [k, 3], sorted: traces per (a, b)."""
    keys, counts = np.unique(a * np.int64(n_b) + b, return_counts=True)
    return np.column_stack([keys // n_b, keys % n_b, counts]).astype(np.int64)


def log_power_sums(
    log_power_values,
    *,
    source,
    receiver,
    offset_bin,
    cmp_bin=None,
    n_sources: int,
    n_receivers: int,
    n_offset_bins: int,
    n_cmp_bins: int | None = None,
    live=None,
) -> LogPowerSums:
    """Sums of the log-spectral decomposition over the live traces.

    log_power_values float [n, n_freq] (:func:`log_power`); source,
    receiver, offset_bin, cmp_bin int [n] term indices below n_sources,
    n_receivers, n_offset_bins, n_cmp_bins (cmp_bin None: no CMP term);
    live bool [n] or None (all live). With ``A`` the 0/1 design matrix of
    the live traces (one column block per kind, :data:`KINDS` order):

    - ``sums[kind]`` float64 [n_kind, n_freq] = ``A_kind^T L``;
    - ``counts[kind]`` int64 [n_kind] = the diagonal of ``A_kind^T A_kind``;
    - ``cross["a|b"]`` int64 [k, 3] rows ``(index a, index b, count)``,
      sorted, the nonzeros of ``A_a^T A_b`` for every pair of kinds ``a``
      before ``b`` in :data:`KINDS` order (``"source|receiver"``,
      ``"source|offset"``, ...);
    - ``sum_sq`` float64 [n_freq] = ``sum L^2``; ``n_traces`` = live traces.

    Sums run in trace order (sparse matrix products), so the same input
    gives bit-identical sums.
    """
    values = np.asarray(log_power_values, dtype=np.float64)
    if values.ndim != 2:
        raise ConfigError(f"log power: got shape {values.shape}; expected [n_traces, n_freq]")
    n, n_freq = values.shape
    terms = {"source": (source, n_sources), "receiver": (receiver, n_receivers), "offset": (offset_bin, n_offset_bins)}
    if (cmp_bin is None) != (n_cmp_bins is None):
        raise ConfigError("cmp_bin and n_cmp_bins go together: pass both for a CMP term or neither")
    if cmp_bin is not None:
        terms["cmp"] = (cmp_bin, n_cmp_bins)
    mask = np.ones(n, bool) if live is None else np.asarray(live, bool).ravel()
    if mask.size != n:
        raise ConfigError(f"live: got {mask.size} values for {n} traces; expected one per trace")
    rows = np.flatnonzero(mask)
    live_values = values[rows]
    if not np.all(np.isfinite(live_values)):
        raise ConfigError("log power of a live trace is not finite; mark traces with NaN or Inf samples not live")
    index = {kind: _indices(kind, idx, n, int(size))[rows] for kind, (idx, size) in terms.items()}
    sums, counts = {}, {}
    for kind, idx in index.items():
        size = int(terms[kind][1])
        design_t = csr_matrix((np.ones(len(rows)), (idx, np.arange(len(rows)))), shape=(size, len(rows)))
        sums[kind] = np.asarray(design_t @ live_values, dtype=np.float64).reshape(size, n_freq)
        counts[kind] = np.bincount(idx, minlength=size).astype(np.int64)
    kinds = [k for k in KINDS if k in index]
    cross = {
        f"{a}|{b}": _cross_counts(index[a], index[b], int(terms[b][1]))
        for i, a in enumerate(kinds) for b in kinds[i + 1:]
    }
    return LogPowerSums(sums=sums, counts=counts, cross=cross,
                        sum_sq=np.einsum("ij,ij->j", live_values, live_values), n_traces=int(len(rows)))
