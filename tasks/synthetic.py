"""Synthetic 3D land surveys with known near-surface filters (pure).

Trace from source station i to receiver station j, frequency domain:

    D_ij(f) = S_i(f) R_j(f) E_ij(f) + N_ij(f)

- ``E_ij``: layered earth seen through a zero-phase Ricker wavelet,
  ``sum_k a_k W(f) exp(-2 pi i f t_k(x))`` with the hyperbolic moveout
  ``t_k(x) = sqrt(t0_k^2 + x^2 / vrms(t0_k)^2)``, ``x`` the offset.
- ``S_i``, ``R_j``: one filter per station (surface consistent). With
  ``A = exp(log_amplitude)``, static ``tau``, scattering fraction ``phi``
  and ``s_tau`` the band-limited unit spike at ``tau``
  (:func:`~descatter.tasks.wavelets.fractional_delay_spike`)::

      filter = A (sqrt(1 - phi) s_tau + sqrt(phi) |s_tau| c)

  ``c`` is a unit-energy coda: band-limited random noise under a
  rise-and-decay envelope starting at ``tau``, made orthogonal to
  ``s_tau``. So ``phi`` is exactly the coda's energy over the whole
  filter's energy, and ``1 - phi`` the share a spike at the true static
  explains. Scenario ``statics`` has ``phi = 0`` (a scaled, shifted spike).
  Filter sample k sits at ``spec.filter_t0_s + k dt`` (``filter_t0_s < 0``
  leaves room for negative statics).
- ``N_ij``: band-limited Gaussian noise whose RMS over the trace is
  ``noise_level`` times the RMS of the noise-free trace.

Truth fields: static ``tau`` = smooth field (three plane waves, RMS
``static_field_rms_s``) + per-station normal jitter, clipped at
``static_limit_s``; log-amplitude likewise (log-normal amplitudes). Both have
zero mean over the stations of each kind, the gauge the solvers fix.
``phi`` = a smooth background in ``scattering_background`` raised towards
``scattering_zone_peak`` in a Gaussian zone, jittered in logit space.

Every random number is a hash of (seed, what it is for, the station or the
source-receiver pair, the sample), so a trace does not depend on which block
it is made in.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.fft as sfft

from .errors import ConfigError
from .synthetic_geometry import (  # noqa: F401  (re-exported: one import for callers)
    FULL_PATCH_MAX_TRACES,
    REFLECTORS,
    SCENARIOS,
    SIZES,
    VELOCITY,
    StationTable,
    StationTables,
    SyntheticSpec,
    TraceGeometry,
    n_traces_per_swath,
    stations,
    swath_traces,
    synthetic_spec,
)
from .wavelets import band_taper, fractional_delay_spike, ricker

KINDS = ("source", "receiver")

TRUTH_KEYS: dict[str, str] = {
    **{
        f"{kind}_{key}": text.format(kind=kind)
        for kind in KINDS
        for key, text in {
            "x": "{kind} station easting, m, float64 [n_{kind}s]",
            "y": "{kind} station northing, m, float64 [n_{kind}s]",
            "elevation": "{kind} station elevation, m, float64 [n_{kind}s]",
            "line": "{kind} line number, int32 [n_{kind}s]",
            "number": "{kind} station number along its line, int32 [n_{kind}s]",
            "filter": "true near-surface filter of each {kind} station, float64 [n_{kind}s, n_filter]; "
                      "sample k at filter_t0_s + k * dt_s",
            "static_s": "true static shift (s) of each {kind} station, zero mean over {kind}s, float64",
            "log_amplitude": "natural log of the true amplitude factor, zero mean over {kind}s, float64",
            "scattering_fraction": "coda energy / whole filter energy of each {kind} station, float64",
        }.items()
    },
    "filter_t0_s": "time of the first filter sample, s (negative: the lead for negative statics), float64 scalar",
    "dt_s": "sample interval, s, float64 scalar",
    "velocity_t0_s": "t0 of the RMS velocity function, s, float64 [n_velocity]",
    "velocity_vrms_mps": "RMS velocity at velocity_t0_s, m/s (linear in t0 between), float64 [n_velocity]",
    "reflector_t0_s": "zero-offset time of each reflector, s, float64 [n_reflectors]",
    "reflector_amplitude": "reflection amplitude of each reflector (Ricker peak), float64 [n_reflectors]",
    "peak_hz": "peak frequency of the zero-phase Ricker wavelet, Hz, float64 scalar",
    "noise_level": "noise RMS over noise-free trace RMS, per trace, float64 scalar",
    "scenario": "'statics' or 'scatter', str scalar",
    "seed": "random seed of the survey, int64 scalar",
    "clean": "optional: traces without station filters and noise, float32 [n_traces, n_samples], "
             "swaths in order and recording order within each (small surveys only)",
}

# streams of the hashed random numbers
_STATIC, _AMPLITUDE, _SCATTER, _DECAY, _CODA, _NOISE = 1, 2, 3, 4, 5, 6


# --------------------------------------------------------------------------- hashed random numbers

_M1, _M2, _GOLDEN = np.uint64(0xBF58476D1CE4E5B9), np.uint64(0x94D049BB133111EB), np.uint64(0x9E3779B97F4A7C15)


def _mix(z: np.ndarray) -> np.ndarray:
    """splitmix64 finaliser on uint64 arrays (wrapping arithmetic)."""
    z = (z ^ (z >> np.uint64(30))) * _M1
    z = (z ^ (z >> np.uint64(27))) * _M2
    return z ^ (z >> np.uint64(31))


def _hash(seed: int, stream: int, *keys) -> np.ndarray:
    """uint64 hash of (seed, stream, keys...), broadcast over the key arrays."""
    with np.errstate(over="ignore"):
        h = _mix(np.atleast_1d(np.asarray((seed & 0xFFFFFFFFFFFF) * 64 + stream, dtype=np.uint64)) + _GOLDEN)
        for key in keys:
            h = _mix(h ^ (np.asarray(key).astype(np.uint64) + _GOLDEN))
    return h


def _hash_normal_pair(seed: int, stream: int, *keys) -> tuple[np.ndarray, np.ndarray]:
    """Two independent standard normals per key (Box-Muller on the two 32-bit halves)."""
    h = _hash(seed, stream, *keys)
    u1 = ((h >> np.uint64(32)).astype(np.float64) + 0.5) / 2.0**32
    u2 = ((h & np.uint64(0xFFFFFFFF)).astype(np.float64) + 0.5) / 2.0**32
    r = np.sqrt(-2.0 * np.log(u1))
    return r * np.cos(2 * np.pi * u2), r * np.sin(2 * np.pi * u2)


def _hash_normal(seed: int, stream: int, *keys) -> np.ndarray:
    return _hash_normal_pair(seed, stream, *keys)[0]


# --------------------------------------------------------------------------- earth response


def rms_velocity(t0_s: np.ndarray, *, velocity: tuple[tuple[float, float], ...]) -> np.ndarray:
    """RMS velocity (m/s) at zero-offset times ``t0_s`` (s) from ``(t0, vrms)`` pairs,
    linear between pairs and constant beyond them. Same shape as ``t0_s``, float64."""
    t, v = np.asarray(velocity, dtype=np.float64).T
    return np.interp(np.asarray(t0_s, dtype=np.float64), t, v)


def reflection_traveltime(offset_m: np.ndarray, *, t0_s: np.ndarray, vrms_mps: np.ndarray) -> np.ndarray:
    """Hyperbolic moveout ``t = sqrt(t0^2 + x^2 / v^2)`` (s); arguments broadcast, float64."""
    x = np.asarray(offset_m, dtype=np.float64)
    return np.sqrt(np.asarray(t0_s, dtype=np.float64) ** 2 + (x / np.asarray(vrms_mps, dtype=np.float64)) ** 2)


def _wavelet_half_width(spec: SyntheticSpec) -> int:
    # |ricker| < 1e-15 beyond 2 / peak_hz
    return int(np.ceil(2.0 / spec.peak_hz / spec.dt_s))


def _clean_buffer(spec: SyntheticSpec, offset: np.ndarray, n_fft: int, last_time_s: float) -> np.ndarray:
    """Reflections through the wavelet on a circular buffer: float64 [n, n_fft], sample m at
    time m * dt (negative times wrapped to the end). Events after ``last_time_s`` are left out."""
    n = len(offset)
    if not spec.reflectors or n == 0:
        return np.zeros((n, n_fft))
    t0, amp = np.asarray(spec.reflectors, dtype=np.float64).T
    tk = reflection_traveltime(offset[:, None], t0_s=t0, vrms_mps=rms_velocity(t0, velocity=spec.velocity))
    hw = _wavelet_half_width(spec)
    m = np.floor(tk / spec.dt_s).astype(np.int64)[..., None] + np.arange(-hw, hw + 2)
    values = np.where(tk <= last_time_s, amp, 0.0)[..., None] * ricker(m * spec.dt_s - tk[..., None], peak_hz=spec.peak_hz)
    index = np.arange(n)[:, None, None] * n_fft + m % n_fft
    return np.bincount(index.ravel(), weights=values.ravel(), minlength=n * n_fft).reshape(n, n_fft)


# --------------------------------------------------------------------------- station truth


@dataclass(frozen=True)
class FilterTruth:
    """True near-surface filters of one kind of station, rows as in its station
    table: filter float64 [n, n_filter]; static_s, log_amplitude,
    scattering_fraction, and the station's x, y (m) float64 [n]."""

    filter: np.ndarray
    static_s: np.ndarray
    log_amplitude: np.ndarray
    scattering_fraction: np.ndarray
    x: np.ndarray
    y: np.ndarray

    def __len__(self) -> int:
        return len(self.static_s)


@dataclass(frozen=True)
class StationTruth:
    """Filters of both kinds; sample k of a filter is at ``filter_t0_s + k * dt_s``."""

    sources: FilterTruth
    receivers: FilterTruth
    filter_t0_s: float
    dt_s: float

    def of(self, kind: str) -> FilterTruth:
        if kind not in KINDS:
            raise ConfigError(f"kind = {kind!r}: expected 'source' or 'receiver'")
        return self.sources if kind == "source" else self.receivers

    def response(self, kind: str, freqs_hz: np.ndarray) -> np.ndarray:
        """See :func:`station_response`."""
        return station_response(self, kind, freqs_hz)


def station_response(truth: StationTruth, kind: str, freqs_hz: np.ndarray) -> np.ndarray:
    """Frequency response of every station filter of ``kind``:
    ``H(f) = sum_k h[k] exp(-2 pi i f (filter_t0_s + k dt))``.

    freqs_hz: float [n_freq]. Returns complex128 [n_stations, n_freq].
    """
    h = truth.of(kind).filter
    t = truth.filter_t0_s + truth.dt_s * np.arange(h.shape[1])
    return h @ np.exp(-2j * np.pi * np.outer(t, np.asarray(freqs_hz, dtype=np.float64)))


def _plane_waves(rng: np.random.Generator, extent_m: float):
    """A smooth random field of RMS about 1: three plane waves of wavelength 0.6-1.6 extents."""
    wavelength = extent_m * rng.uniform(0.6, 1.6, 3)
    angle, phase = rng.uniform(0, np.pi, 3), rng.uniform(0, 2 * np.pi, 3)
    kx, ky = 2 * np.pi * np.cos(angle) / wavelength, 2 * np.pi * np.sin(angle) / wavelength

    def field(x: np.ndarray, y: np.ndarray) -> np.ndarray:
        return np.sqrt(2 / 3) * np.cos(x[:, None] * kx + y[:, None] * ky + phase).sum(axis=1)

    return field


def _logit(p: np.ndarray) -> np.ndarray:
    return np.log(p / (1 - p))


def _kind_truth(spec: SyntheticSpec, table: StationTable, kind: int, fields: dict) -> FilterTruth:
    """Truth of one kind of station (kind 0 sources, 1 receivers); ``fields`` the shared smooth fields."""
    x, y = table.x - spec.origin_x_m, table.y - spec.origin_y_m
    keys = (kind, table.line, table.number)
    n_filter, lead, dt = spec.n_filter, spec.filter_lead_samples, spec.dt_s

    smooth = fields["static"](x, y)
    static = spec.static_field_rms_s * (smooth - smooth.mean()) + spec.static_jitter_rms_s * _hash_normal(spec.seed, _STATIC, *keys)
    static = np.clip(static, -spec.static_limit_s, spec.static_limit_s)
    static -= static.mean()
    room = (lead - spec.spike_half_width) * dt  # the direct spike must start inside the filter
    if static.min() < -room:
        raise ConfigError(f"a static of {static.min():.4f} s does not fit the {spec.filter_lead_s} s filter lead; "
                          f"raise filter_lead_s or lower static_limit_s")
    log_amp = (spec.log_amplitude_field_rms * fields["amplitude"](x, y)
               + spec.log_amplitude_jitter_rms * _hash_normal(spec.seed, _AMPLITUDE, *keys))
    log_amp -= log_amp.mean()

    spike = fractional_delay_spike(n_filter, delay_samples=lead + static / dt,
                                   half_width=spec.spike_half_width, kaiser_beta=spec.spike_kaiser_beta)
    spike_norm = np.linalg.norm(spike, axis=1, keepdims=True)
    if spec.scenario == "statics":
        phi = np.zeros(len(table))
        filt = spike
    else:
        lo, hi = spec.scattering_background
        background = 0.5 * (lo + hi) + 0.5 * (hi - lo) * np.clip(fields["background"](x, y) / np.sqrt(2), -1, 1)
        smooth = background + (spec.scattering_zone_peak - background) * fields["zone"](x, y)
        phi = 1 / (1 + np.exp(-(_logit(smooth) + spec.scattering_jitter * _hash_normal(spec.seed, _SCATTER, *keys))))
        phi = np.clip(phi, 0.02, 0.97)
        # coda: band-limited noise, then a rise-and-decay envelope from the direct arrival
        sample = np.arange(n_filter)
        white = _hash_normal(spec.seed, _CODA, *(k[:, None] if np.ndim(k) else k for k in keys), sample)
        n_band = 2 * n_filter
        band = band_taper(sfft.rfftfreq(n_band, dt), corners_hz=spec.coda_band_hz)
        noise = sfft.irfft(sfft.rfft(white, n_band, axis=-1) * band, n_band, axis=-1)[:, :n_filter]
        decay = spec.coda_decay_s * np.exp(spec.coda_decay_jitter * _hash_normal(spec.seed, _DECAY, *keys))
        t = (sample - lead) * dt - static[:, None]
        after = np.maximum(t, 0.0)
        envelope = np.where(t > 0, (1 - np.exp(-after / spec.coda_rise_s)) * np.exp(-after / decay[:, None]), 0.0)
        envelope *= np.cos(0.5 * np.pi * np.clip((sample - 0.85 * n_filter) / (0.15 * n_filter), 0, 1)) ** 2
        coda = noise * envelope
        coda -= (np.sum(coda * spike, axis=1, keepdims=True) / spike_norm**2) * spike
        coda /= np.linalg.norm(coda, axis=1, keepdims=True)
        filt = np.sqrt(1 - phi)[:, None] * spike + np.sqrt(phi)[:, None] * spike_norm * coda
    return FilterTruth(filter=np.exp(log_amp)[:, None] * filt, static_s=static, log_amplitude=log_amp,
                       scattering_fraction=phi, x=table.x, y=table.y)


def station_truth(spec: SyntheticSpec, tables: StationTables | None = None) -> StationTruth:
    """True filters and attributes of every source and receiver station (see the module notes)."""
    tables = stations(spec) if tables is None else tables
    xs = np.concatenate([tables.sources.x, tables.receivers.x]) - spec.origin_x_m
    ys = np.concatenate([tables.sources.y, tables.receivers.y]) - spec.origin_y_m
    extent = max(xs.max() - xs.min(), ys.max() - ys.min(), 100.0)
    # the zone sits among the sources, so both kinds of station stand in it
    sx, sy = tables.sources.x - spec.origin_x_m, tables.sources.y - spec.origin_y_m
    rng = np.random.default_rng([spec.seed, 23])
    centre = (sx.min() + (sx.max() - sx.min()) * rng.uniform(0.2, 0.8),
              sy.min() + (sy.max() - sy.min()) * rng.uniform(0.2, 0.8))
    source_extent = max(sx.max() - sx.min(), sy.max() - sy.min(), 50.0)
    sigma = spec.scattering_zone_sigma * min(extent, 2.0 * source_extent)

    def zone(x: np.ndarray, y: np.ndarray) -> np.ndarray:
        return np.exp(-((x - centre[0]) ** 2 + (y - centre[1]) ** 2) / (2 * sigma**2))

    fields = {"static": _plane_waves(rng, extent), "amplitude": _plane_waves(rng, extent),
              "background": _plane_waves(rng, extent), "zone": zone}
    return StationTruth(
        sources=_kind_truth(spec, tables.sources, 0, fields),
        receivers=_kind_truth(spec, tables.receivers, 1, fields),
        filter_t0_s=spec.filter_t0_s,
        dt_s=spec.dt_s,
    )


# --------------------------------------------------------------------------- traces


def _noise(spec: SyntheticSpec, source_index: np.ndarray, receiver_index: np.ndarray) -> np.ndarray:
    """Band-limited Gaussian noise of unit RMS per trace, float64 [n, n_samples]."""
    n_fft = sfft.next_fast_len(spec.n_samples, real=True)
    freqs = sfft.rfftfreq(n_fft, spec.dt_s)
    re, im = _hash_normal_pair(spec.seed, _NOISE, source_index[:, None], receiver_index[:, None], np.arange(len(freqs)))
    noise = sfft.irfft((re + 1j * im) * band_taper(freqs, corners_hz=spec.noise_band_hz), n_fft, axis=-1, workers=-1)
    noise = noise[:, : spec.n_samples]
    return noise / np.sqrt(np.mean(noise**2, axis=1, keepdims=True))


def synthesize(
    spec: SyntheticSpec,
    truth: StationTruth,
    geometry: TraceGeometry | np.ndarray,
    receiver_index: np.ndarray | None = None,
    *,
    station_filters: bool = True,
    noise: bool = True,
) -> np.ndarray:
    """Traces ``d_ij = s_i * r_j * e_ij + n_ij`` for the traces of ``geometry``.

    ``e_ij``: the reflections (``spec.reflectors``) through the Ricker
    wavelet at their moveout times; ``s_i``, ``r_j``: the station filters of
    ``truth`` (with ``filter_t0_s`` honoured, so a zero static keeps times);
    ``n_ij``: noise of RMS ``spec.noise_level`` times the RMS of the
    noise-free trace. ``station_filters=False, noise=False`` gives the clean
    traces. Each trace depends only on its source, receiver and offset, so
    any split into blocks gives the same samples. Computed in float64 with
    batched real FFTs long enough that nothing wraps into the trace.

    geometry: any selection of a :class:`TraceGeometry` (its source_index,
    receiver_index and offset are used); or int [n] source-table rows with
    ``receiver_index`` int [n] receiver-table rows (offsets from the station
    positions in ``truth``; the same samples). Returns float32
    [n, spec.n_samples]; sample k at time k * dt_s.
    """
    if receiver_index is None:
        src = np.asarray(geometry.source_index, dtype=np.int64)
        rcv = np.asarray(geometry.receiver_index, dtype=np.int64)
        offset = np.asarray(geometry.offset, dtype=np.float64)
    else:
        src = np.asarray(geometry, dtype=np.int64).reshape(-1)
        rcv = np.asarray(receiver_index, dtype=np.int64).reshape(-1)
        if src.shape != rcv.shape:
            raise ConfigError(f"source_index has {len(src)} traces but receiver_index {len(rcv)}: expected one pair per trace")
        s, r = truth.sources, truth.receivers
        offset = np.hypot(s.x[src] - r.x[rcv], s.y[src] - r.y[rcv])
    n, n_s = len(src), spec.n_samples
    hw, lead, n_filter = _wavelet_half_width(spec), spec.filter_lead_samples, spec.n_filter
    last_time = (n_s - 1 + hw + (2 * lead if station_filters else 0)) * spec.dt_s
    n_fft = sfft.next_fast_len(n_s + 2 * lead + 2 * hw + 2 * n_filter + 2, real=True)
    clean = _clean_buffer(spec, offset, n_fft, last_time)
    if station_filters and n:
        spectrum = sfft.rfft(clean, axis=-1, workers=-1)
        for index, filters in ((src, truth.sources.filter), (rcv, truth.receivers.filter)):
            used, where = np.unique(index, return_inverse=True)
            spectrum *= sfft.rfft(filters[used], n_fft, axis=-1, workers=-1)[where]
        traces = sfft.irfft(spectrum, n_fft, axis=-1, workers=-1)[:, 2 * lead : 2 * lead + n_s]
    else:
        traces = clean[:, :n_s]
    if noise and spec.noise_level > 0 and n:
        rms = np.sqrt(np.mean(traces**2, axis=1, keepdims=True))
        traces = traces + spec.noise_level * rms * _noise(spec, src, rcv)
    return traces.astype(np.float32)


# --------------------------------------------------------------------------- truth file contents


def truth_arrays(spec: SyntheticSpec, truth: StationTruth, tables: StationTables) -> dict[str, np.ndarray]:
    """Everything in :data:`TRUTH_KEYS` except ``clean``, as numpy arrays
    (scalars as 0-d arrays), ready for ``numpy.savez``."""
    out: dict[str, np.ndarray] = {}
    for kind, table, filters in (("source", tables.sources, truth.sources), ("receiver", tables.receivers, truth.receivers)):
        out |= {
            f"{kind}_x": table.x, f"{kind}_y": table.y, f"{kind}_elevation": table.elevation,
            f"{kind}_line": table.line, f"{kind}_number": table.number,
            f"{kind}_filter": filters.filter, f"{kind}_static_s": filters.static_s,
            f"{kind}_log_amplitude": filters.log_amplitude,
            f"{kind}_scattering_fraction": filters.scattering_fraction,
        }
    velocity = np.asarray(spec.velocity, dtype=np.float64).reshape(-1, 2)
    reflectors = np.asarray(spec.reflectors, dtype=np.float64).reshape(-1, 2)
    out |= {
        "filter_t0_s": np.float64(truth.filter_t0_s), "dt_s": np.float64(truth.dt_s),
        "velocity_t0_s": velocity[:, 0], "velocity_vrms_mps": velocity[:, 1],
        "reflector_t0_s": reflectors[:, 0], "reflector_amplitude": reflectors[:, 1],
        "peak_hz": np.float64(spec.peak_hz), "noise_level": np.float64(spec.noise_level),
        "scenario": np.str_(spec.scenario), "seed": np.int64(spec.seed),
    }
    return {key: np.asarray(value) for key, value in out.items()}
