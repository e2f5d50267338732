"""Sufficient statistics of the surface-consistent estimation.

Every statistic is a sum over traces, so partial sums of chunks, shots and
swaths add up exactly: ``a + b`` of two partials over disjoint traces equals
the statistic of their union. Sums are complex128 / float64 and must be
added in a fixed order by callers so reruns are bit-identical.

Shapes: ``n_freq`` frequencies of the analysis band (columns), stations
indexed into the survey's append-only station tables.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


def _merge_pairs(pairs_a, pairs_b):
    """Union of two (n, 2) pair tables and the row of each input in it,
    ordered lexicographically so the result does not depend on input order."""
    both = np.concatenate([pairs_a, pairs_b], axis=0)
    union, inverse = np.unique(both, axis=0, return_inverse=True)
    inverse = inverse.reshape(-1)
    return union, inverse[: len(pairs_a)], inverse[len(pairs_a):]


@dataclass
class PairSums:
    """Cross-spectral sums over station pairs (receiver pairs or source pairs).

    For receiver pairs (j, k) recorded by the same shot i:
    ``cross[p] = sum_i D_ij conj(D_ik)``, ``power_a[p] = sum_i |D_ij|^2``,
    ``power_b[p] = sum_i |D_ik|^2``, ``count[p]`` = number of shots.
    For source pairs (i, l) at a common receiver j: the same with roles swapped.

    pairs:   int64 [n_pairs, 2], station indices, each row (a, b) with a < b,
             rows sorted lexicographically
    cross:   complex128 [n_pairs, n_freq]
    power_a, power_b: float64 [n_pairs, n_freq]
    count:   int64 [n_pairs]
    """

    pairs: np.ndarray
    cross: np.ndarray
    power_a: np.ndarray
    power_b: np.ndarray
    count: np.ndarray

    @classmethod
    def empty(cls, n_freq: int) -> "PairSums":
        return cls(np.zeros((0, 2), np.int64), np.zeros((0, n_freq), np.complex128),
                   np.zeros((0, n_freq)), np.zeros((0, n_freq)), np.zeros(0, np.int64))

    @property
    def n_freq(self) -> int:
        return self.cross.shape[1]

    def __add__(self, other: "PairSums") -> "PairSums":
        union, ia, ib = _merge_pairs(self.pairs, other.pairs)
        out = PairSums.empty(self.n_freq)
        out.pairs = union
        out.cross = np.zeros((len(union), self.n_freq), np.complex128)
        out.power_a = np.zeros((len(union), self.n_freq))
        out.power_b = np.zeros((len(union), self.n_freq))
        out.count = np.zeros(len(union), np.int64)
        for idx, part in ((ia, self), (ib, other)):
            out.cross[idx] += part.cross
            out.power_a[idx] += part.power_a
            out.power_b[idx] += part.power_b
            out.count[idx] += part.count
        return out

    def coherence(self) -> np.ndarray:
        """|cross| / sqrt(power_a power_b), float64 [n_pairs, n_freq], 0 where empty."""
        den = np.sqrt(self.power_a * self.power_b)
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(den > 0, np.abs(self.cross) / den, 0.0)

    def to_arrays(self, prefix: str = "") -> dict[str, np.ndarray]:
        return {f"{prefix}{k}": getattr(self, k) for k in ("pairs", "cross", "power_a", "power_b", "count")}

    @classmethod
    def from_arrays(cls, arrays: dict[str, np.ndarray], prefix: str = "") -> "PairSums":
        return cls(*(np.asarray(arrays[f"{prefix}{k}"]) for k in ("pairs", "cross", "power_a", "power_b", "count")))


@dataclass
class LogPowerSums:
    """Normal-equation pieces of L_ij(f) = s_i(f) + r_j(f) + o_h(f) (+ c_m(f)).

    With L = log |D|^2 per trace, the least-squares normal equations need only
    sums: per term its sum of L and its trace count, and between two terms
    the count of traces they share. Term kinds are ``source``, ``receiver``,
    ``offset`` (offset bin) and optionally ``cmp`` (CMP bin).

    sums:   {kind: float64 [n_kind, n_freq]}   sum of L over the kind's traces
    counts: {kind: int64 [n_kind]}
    cross:  {"a|b": int64 [n_entries, 3]}       rows (index in a, index in b, count),
            sorted, for every pair of kinds
    sum_sq: float64 [n_freq]                    sum of L^2 (for the residual)
    n_traces: int
    """

    sums: dict[str, np.ndarray]
    counts: dict[str, np.ndarray]
    cross: dict[str, np.ndarray]
    sum_sq: np.ndarray
    n_traces: int

    def __add__(self, other: "LogPowerSums") -> "LogPowerSums":
        sums, counts = {}, {}
        for kind in sorted(set(self.sums) | set(other.sums)):
            a, b = self.sums.get(kind), other.sums.get(kind)
            ca, cb = self.counts.get(kind), other.counts.get(kind)
            n = max(len(x) for x in (a, b) if x is not None)
            nf = self.sum_sq.shape[0]
            s = np.zeros((n, nf))
            c = np.zeros(n, np.int64)
            for x, cx in ((a, ca), (b, cb)):
                if x is not None:
                    s[: len(x)] += x
                    c[: len(cx)] += cx
            sums[kind], counts[kind] = s, c
        cross = {}
        for key in sorted(set(self.cross) | set(other.cross)):
            rows = np.concatenate([self.cross.get(key, np.zeros((0, 3), np.int64)),
                                   other.cross.get(key, np.zeros((0, 3), np.int64))])
            ij, inv = np.unique(rows[:, :2], axis=0, return_inverse=True)
            cnt = np.zeros(len(ij), np.int64)
            np.add.at(cnt, inv.reshape(-1), rows[:, 2])
            cross[key] = np.column_stack([ij, cnt]).astype(np.int64)
        return LogPowerSums(sums, counts, cross, self.sum_sq + other.sum_sq, self.n_traces + other.n_traces)
