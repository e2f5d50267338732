"""Design and geometry of the synthetic land surveys (pure).

The scenario is our own: an orthogonal 3D land survey on a projected grid
with a false origin of 431,250 m E / 6,512,400 m N, ground near 284 m above
datum with a few metres of gentle relief.

- Receiver lines run along x (east), 50 m apart, receivers every 12.5 m.
- Source lines run along y (north), 75 m apart, sources every 12.5 m. One
  source line is one swath (later one SEG-Y file).
- A shot is one source station firing once; shots fire along their line,
  northward on even swaths and southward on odd ones. Field record numbers
  count shots across the whole survey from ``first_field_record``; channels
  count the live receivers of each record from 1 in receiver-table order.
- Small surveys record every receiver from every shot; large ones record
  the receivers within ``max_offset_m`` (and list only receivers that some
  shot records).

Spacing against the scattering layer (common practice: 100-300 m/s in the
top metres, so wavelengths of about 1-5 m at seismic frequencies): with
180 m/s the wavelength is 2.8 m at 65 Hz and 6 m at the 30 Hz peak, so a
12.5 m station interval does not sample the scattered wavefield, as in real
surveys, and spacing QC is expected to warn. Each station's scattering is
therefore drawn independently of its neighbours'. The receiver graph is
connected by a pair radius just above the 50 m receiver-line interval
(``receiver_pair_radius_m``); source lines by one just above 75 m.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np

from .errors import ConfigError

SIZES = ("tiny", "demo", "large")
SCENARIOS = ("statics", "scatter")

# RMS velocity of the scenario's layered earth, (t0 s, vrms m/s), linear in t0.
VELOCITY: tuple[tuple[float, float], ...] = ((0.0, 1650.0), (0.6, 2050.0), (1.2, 2450.0), (2.0, 2900.0))

# Reflectors (t0 s, amplitude); a survey keeps those at least 0.1 s before its last sample.
REFLECTORS: tuple[tuple[float, float], ...] = (
    (0.180, 1.00), (0.310, -0.70), (0.440, 0.80), (0.600, 0.55),
    (0.730, -0.60), (0.880, 0.45), (1.050, -0.50), (1.200, 0.60),
    (1.380, 0.40), (1.520, -0.45), (1.690, 0.50), (1.850, 0.35),
)

# Above this many traces a survey records a max-offset patch, not every receiver.
FULL_PATCH_MAX_TRACES = 60_000
_MIN_TRACES = 500


@dataclass(frozen=True)
class SyntheticSpec:
    """Every number that defines one synthetic survey; build with :func:`synthetic_spec`.

    Lengths in metres, times in seconds, frequencies in Hz. Band corners are
    ``(f1, f2, f3, f4)`` of :func:`descatter.tasks.wavelets.band_taper`.
    """

    size: str = "tiny"  # "tiny", "demo", "large" or "n_traces"
    scenario: str = "scatter"  # "statics" (shifts and amplitudes) or "scatter" (everything)
    seed: int = 0
    # geometry
    n_receiver_lines: int = 4
    receivers_per_line: int = 24
    n_swaths: int = 3  # source lines
    shots_per_line: int = 8
    max_offset_m: float | None = None  # None: every receiver is live for every shot
    receiver_interval_m: float = 12.5
    receiver_line_interval_m: float = 50.0
    source_interval_m: float = 12.5
    source_line_interval_m: float = 75.0
    origin_x_m: float = 431_250.0
    origin_y_m: float = 6_512_400.0
    elevation_m: float = 284.0
    elevation_relief_m: float = 3.5
    first_field_record: int = 1001
    # recording
    n_samples: int = 250
    dt_s: float = 0.004
    # earth response
    velocity: tuple[tuple[float, float], ...] = VELOCITY
    reflectors: tuple[tuple[float, float], ...] = REFLECTORS[:6]
    peak_hz: float = 30.0
    # station filters: sample k of a filter is at time filter_t0_s + k * dt_s
    filter_lead_s: float = 0.064
    filter_length_s: float = 0.384
    spike_half_width: int = 8  # samples
    spike_kaiser_beta: float = 8.0
    coda_rise_s: float = 0.006
    coda_decay_s: float = 0.09  # amplitude e-folding time
    coda_decay_jitter: float = 0.25  # log-normal spread of the decay time
    coda_band_hz: tuple[float, float, float, float] = (3.0, 6.0, 80.0, 100.0)
    static_field_rms_s: float = 0.006
    static_jitter_rms_s: float = 0.0025
    static_limit_s: float = 0.024
    log_amplitude_field_rms: float = 0.10
    log_amplitude_jitter_rms: float = 0.20
    scattering_background: tuple[float, float] = (0.22, 0.48)
    scattering_zone_peak: float = 0.93
    scattering_zone_sigma: float = 0.15  # Gaussian radius as a fraction of the survey extent
    scattering_jitter: float = 0.35  # standard deviation in logit(fraction)
    # noise: RMS of the noise over the trace = noise_level * RMS of the noise-free trace
    noise_level: float = 0.5
    noise_band_hz: tuple[float, float, float, float] = (2.0, 5.0, 60.0, 90.0)
    # what the analysis should use on this survey (keys of AnalysisConfig).
    # The window's tapers (50 ms) must stay clear of every reflection moved
    # by the largest statics and wavelet half-length: a reflection shifting
    # through a taper biases its phase (measured: statics 11% too small
    # with the window edge on the 0.18 s reflector).
    window_start_s: float = 0.07
    window_end_s: float = 0.99
    band_hz: tuple[float, float] = (10.0, 65.0)
    near_surface_velocity_mps: float = 180.0

    def __post_init__(self) -> None:
        if self.scenario not in SCENARIOS:
            raise ConfigError(f"scenario = {self.scenario!r}: expected one of {', '.join(SCENARIOS)}")
        counts = {
            "n_receiver_lines": (self.n_receiver_lines, 1), "receivers_per_line": (self.receivers_per_line, 2),
            "n_swaths": (self.n_swaths, 1), "shots_per_line": (self.shots_per_line, 1), "n_samples": (self.n_samples, 16),
        }
        for name, (value, least) in counts.items():
            if value < least:
                raise ConfigError(f"{name} = {value}: expected at least {least}")
        lead = self.filter_lead_s / self.dt_s
        if abs(lead - round(lead)) > 1e-6:
            raise ConfigError(f"filter_lead_s = {self.filter_lead_s} must be a whole number of samples of dt_s = {self.dt_s}")
        if self.static_limit_s / self.dt_s > round(lead) - self.spike_half_width - 1:
            raise ConfigError(
                f"static_limit_s = {self.static_limit_s} leaves no room for the direct spike in a "
                f"{self.filter_lead_s} s lead; raise filter_lead_s or lower static_limit_s"
            )
        if self.filter_length_s <= self.filter_lead_s + 0.1:
            raise ConfigError(f"filter_length_s = {self.filter_length_s} must exceed filter_lead_s + 0.1 s")

    @property
    def filter_lead_samples(self) -> int:
        """Samples before time zero in a station filter."""
        return int(round(self.filter_lead_s / self.dt_s))

    @property
    def n_filter(self) -> int:
        """Samples per station filter."""
        return int(round(self.filter_length_s / self.dt_s))

    @property
    def filter_t0_s(self) -> float:
        """Time of the first station-filter sample (negative: the lead)."""
        return -self.filter_lead_samples * self.dt_s

    @property
    def window_s(self) -> tuple[float, float]:
        """Analysis window (start, end) after NMO, s."""
        return self.window_start_s, self.window_end_s

    @property
    def receiver_pair_radius_m(self) -> float:
        """A receiver-pair radius that joins neighbouring receiver lines."""
        return 1.1 * self.receiver_line_interval_m

    @property
    def source_pair_radius_m(self) -> float:
        """A source-pair radius that joins neighbouring source lines."""
        return 1.1 * self.source_line_interval_m

    def analysis_settings(self) -> dict:
        """Plain values for the keys of ``descatter.tasks.config.AnalysisConfig``."""
        return {
            "velocity": [list(pair) for pair in self.velocity],
            "window_start_s": self.window_start_s,
            "window_end_s": self.window_end_s,
            "band_hz": self.band_hz,
            "near_surface_velocity_mps": self.near_surface_velocity_mps,
        }


def _cover_grid(n_swaths: int, shots_per_line: int, max_offset_m: float) -> tuple[int, int]:
    """Receiver lines and receivers per line reaching max_offset beyond every source."""
    d = SyntheticSpec()
    lines = math.ceil(((shots_per_line - 1) * d.source_interval_m + 2 * max_offset_m) / d.receiver_line_interval_m) + 1
    per_line = math.ceil(((n_swaths - 1) * d.source_line_interval_m + 2 * max_offset_m) / d.receiver_interval_m) + 1
    return lines, per_line


def _span_source_lines(receivers_per_line: int, n_swaths: int) -> int:
    """Receivers per line so the spread reaches half a line interval past the outer source lines."""
    d = SyntheticSpec()
    need = math.ceil(n_swaths * d.source_line_interval_m / d.receiver_interval_m) + 1
    return max(receivers_per_line, need)


_PRESETS = {
    "tiny": dict(n_receiver_lines=4, receivers_per_line=24, n_swaths=3, shots_per_line=8, max_offset_m=None, n_samples=250),
    "demo": dict(n_receiver_lines=6, receivers_per_line=48, n_swaths=5, shots_per_line=20, max_offset_m=None, n_samples=450),
    "large": dict(n_swaths=6, shots_per_line=40, max_offset_m=500.0, n_samples=500),
}


def _scenario_values(scenario: str) -> dict:
    if scenario == "statics":
        return {"noise_level": 0.02}
    return {"noise_level": 0.5}


def _sampling_values(n_samples: int, dt_s: float = 0.004) -> dict:
    last = (n_samples - 1) * dt_s
    return {
        "n_samples": n_samples,
        "reflectors": tuple(r for r in REFLECTORS if r[0] <= last - 0.1),
        "window_end_s": round(last, 3),
    }


def _sized_for_traces(n_traces: int, n_swaths: int | None) -> dict:
    if n_traces <= FULL_PATCH_MAX_TRACES:
        swaths = n_swaths or max(3, round(math.sqrt(n_traces) / 34))
        lines = max(2, round((n_traces / (24 * swaths)) ** (1 / 3)))
        per_line = _span_source_lines(8 * lines, swaths)
        shots = max(2, round(n_traces / (swaths * lines * per_line)))
        return dict(n_receiver_lines=lines, receivers_per_line=per_line, n_swaths=swaths,
                    shots_per_line=shots, max_offset_m=None)
    max_offset = 500.0
    d = SyntheticSpec()
    disk = math.pi * max_offset**2 / (d.receiver_interval_m * d.receiver_line_interval_m)
    swaths = n_swaths or max(3, round(n_traces / (40 * disk)))
    shots = max(2, round(n_traces / (swaths * disk)))
    for _ in range(2):  # shots near the grid's line ends see a little less than the full disk
        lines, per_line = _cover_grid(swaths, shots, max_offset)
        trial = SyntheticSpec(n_receiver_lines=lines, receivers_per_line=per_line, n_swaths=swaths,
                              shots_per_line=shots, max_offset_m=max_offset)
        per_swath = len(_swath_live(trial, stations(trial), 0)[0])
        shots = max(2, round(shots * n_traces / (swaths * per_swath)))
    lines, per_line = _cover_grid(swaths, shots, max_offset)
    return dict(n_receiver_lines=lines, receivers_per_line=per_line, n_swaths=swaths,
                shots_per_line=shots, max_offset_m=max_offset)


def synthetic_spec(
    *,
    size: str | None = "tiny",
    n_traces: int | None = None,
    n_swaths: int | None = None,
    scenario: str = "scatter",
    seed: int = 0,
) -> SyntheticSpec:
    """The spec of a preset survey (``size``) or one of about ``n_traces`` traces.

    Presets: ``tiny`` 4 x 24 receivers, 3 swaths of 8 shots, every receiver
    live, 250 samples (2,304 traces); ``demo`` 6 x 48 receivers, 5 swaths of
    20 shots, 450 samples (28,800 traces); ``large`` 6 swaths of 40 shots
    recording receivers within 500 m, 500 samples (about 300,000 traces).
    ``n_traces`` (which takes precedence over ``size``) scales the grid: every
    receiver live up to 60,000 traces, a 500 m max-offset patch above, 500
    samples. ``n_swaths`` overrides the number of source lines; receiver
    lines grow to span them.
    """
    if scenario not in SCENARIOS:
        raise ConfigError(f"scenario = {scenario!r}: expected one of {', '.join(SCENARIOS)}")
    if n_swaths is not None and n_swaths < 1:
        raise ConfigError(f"n_swaths = {n_swaths}: expected at least 1 source line")
    values: dict = {"scenario": scenario, "seed": int(seed), **_scenario_values(scenario)}
    if n_traces is not None:
        if n_traces < _MIN_TRACES:
            raise ConfigError(
                f"n_traces = {n_traces} is too small: expected at least {_MIN_TRACES} "
                f"(or use size='tiny' for the smallest preset)"
            )
        values.update(size="n_traces", **_sized_for_traces(int(n_traces), n_swaths), **_sampling_values(500))
    elif size in _PRESETS:
        preset = dict(_PRESETS[size])
        if n_swaths is not None:
            preset["n_swaths"] = n_swaths
        samples = preset.pop("n_samples")
        if preset["max_offset_m"] is None:
            preset["receivers_per_line"] = _span_source_lines(preset["receivers_per_line"], preset["n_swaths"])
        else:
            preset["n_receiver_lines"], preset["receivers_per_line"] = _cover_grid(
                preset["n_swaths"], preset["shots_per_line"], preset["max_offset_m"])
        values.update(size=size, **preset, **_sampling_values(samples))
    else:
        raise ConfigError(f"size = {size!r}: expected one of {', '.join(SIZES)}, or pass n_traces=N")
    spec = SyntheticSpec(**values)
    if n_traces is not None:
        got = sum(n_traces_per_swath(spec))
        if not n_traces / 2 <= got <= 2 * n_traces:
            raise ConfigError(
                f"n_traces = {n_traces} with n_swaths = {spec.n_swaths} gives {got} traces: the source "
                f"lines need a receiver spread that large; ask for fewer swaths or more traces"
            )
    return spec


# --------------------------------------------------------------------------- stations


@dataclass(frozen=True)
class StationTable:
    """One kind of station, one row each: float64 x, y, elevation (m), int32
    line and number (station number along its line); for sources also int32
    swath (0-based index of its source line, which is ``line - 1``)."""

    x: np.ndarray
    y: np.ndarray
    elevation: np.ndarray
    line: np.ndarray
    number: np.ndarray
    swath: np.ndarray | None = None

    def __len__(self) -> int:
        return len(self.x)


@dataclass(frozen=True)
class StationTables:
    sources: StationTable
    receivers: StationTable


def _elevation(spec: SyntheticSpec, x: np.ndarray, y: np.ndarray) -> np.ndarray:
    p = np.random.default_rng([spec.seed, 11]).uniform(0.0, 2 * np.pi, 2)
    xr, yr = x - spec.origin_x_m, y - spec.origin_y_m
    wave = 0.6 * np.sin(2 * np.pi * xr / 1900.0 + p[0]) + 0.4 * np.sin(2 * np.pi * yr / 1300.0 + p[1])
    return spec.elevation_m + spec.elevation_relief_m * wave + 0.004 * xr


def _source_positions(spec: SyntheticSpec) -> tuple[float, float]:
    """x of the first source line and y of the first source, centred on the receiver grid
    and half an interval off the receiver grid."""
    ri, si = spec.receiver_interval_m, spec.source_interval_m
    cx = ((spec.receivers_per_line - 1) * ri - (spec.n_swaths - 1) * spec.source_line_interval_m) / 2
    cy = ((spec.n_receiver_lines - 1) * spec.receiver_line_interval_m - (spec.shots_per_line - 1) * si) / 2
    return (math.floor(cx / ri) + 0.5) * ri, (math.floor(cy / si) + 0.5) * si


def _source_table(spec: SyntheticSpec) -> StationTable:
    x_first, y_first = _source_positions(spec)
    swath, q = np.divmod(np.arange(spec.n_swaths * spec.shots_per_line), spec.shots_per_line)
    x = spec.origin_x_m + x_first + swath * spec.source_line_interval_m
    y = spec.origin_y_m + y_first + q * spec.source_interval_m
    return StationTable(x=x, y=y, elevation=_elevation(spec, x, y), line=(swath + 1).astype(np.int32),
                        number=(2001 + q).astype(np.int32), swath=swath.astype(np.int32))


def _receiver_grid(spec: SyntheticSpec) -> tuple[np.ndarray, np.ndarray]:
    r, k = np.divmod(np.arange(spec.n_receiver_lines * spec.receivers_per_line), spec.receivers_per_line)
    return r, k


def _distance_to_nearest_source(spec: SyntheticSpec, x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Horizontal distance from each point to its nearest source station, [n] float64."""
    x_first, y_first = _source_positions(spec)
    xs = spec.origin_x_m + x_first + np.arange(spec.n_swaths) * spec.source_line_interval_m
    y0 = spec.origin_y_m + y_first
    q = np.clip(np.round((y - y0) / spec.source_interval_m), 0, spec.shots_per_line - 1)
    dy = y - (y0 + q * spec.source_interval_m)
    return np.hypot(x[:, None] - xs[None, :], dy[:, None]).min(axis=1)


def stations(spec: SyntheticSpec) -> StationTables:
    """Source and receiver station tables of the survey.

    Sources are ordered by line, then northward along the line; receivers by
    line (south to north), then eastward. Receiver lines are numbered from
    101 and receivers along them from 1001; source lines from 1 and sources
    along them from 2001. With a max-offset patch only receivers some shot
    records are listed (so the receiver table is not a full rectangle).
    """
    r, k = _receiver_grid(spec)
    x = spec.origin_x_m + k * spec.receiver_interval_m
    y = spec.origin_y_m + r * spec.receiver_line_interval_m
    if spec.max_offset_m is not None:
        keep = _distance_to_nearest_source(spec, x, y) <= spec.max_offset_m + 1e-9
        r, k, x, y = r[keep], k[keep], x[keep], y[keep]
    receivers = StationTable(x=x, y=y, elevation=_elevation(spec, x, y),
                             line=(101 + r).astype(np.int32), number=(1001 + k).astype(np.int32))
    return StationTables(sources=_source_table(spec), receivers=receivers)


# --------------------------------------------------------------------------- traces


@dataclass(frozen=True)
class TraceGeometry:
    """Per-trace geometry of consecutive traces, all arrays [n]: int32
    field_record, channel, energy_source_point (the source station number),
    source_index, receiver_index (rows of the station tables); float64
    source_x/y/elevation, receiver_x/y/elevation and offset (horizontal
    source-receiver distance), metres. Index it like an array to select
    traces (``geometry[0:500]``, a mask, an index array; an integer gives
    one trace as a geometry of length 1)."""

    field_record: np.ndarray
    channel: np.ndarray
    energy_source_point: np.ndarray
    source_index: np.ndarray
    receiver_index: np.ndarray
    source_x: np.ndarray
    source_y: np.ndarray
    source_elevation: np.ndarray
    receiver_x: np.ndarray
    receiver_y: np.ndarray
    receiver_elevation: np.ndarray
    offset: np.ndarray

    def __len__(self) -> int:
        return len(self.offset)

    def __getitem__(self, key) -> "TraceGeometry":
        if isinstance(key, (int, np.integer)):
            key = [key]  # one trace stays a geometry of length 1
        return replace(self, **{name: value[key] for name, value in vars(self).items()})


def _firing_order(spec: SyntheticSpec, swath: int) -> np.ndarray:
    """Source-table rows of one swath's shots in firing order (snaking along the lines)."""
    rows = swath * spec.shots_per_line + np.arange(spec.shots_per_line)
    return rows if swath % 2 == 0 else rows[::-1]


def _swath_live(spec: SyntheticSpec, tables: StationTables, swath: int) -> tuple[np.ndarray, np.ndarray]:
    """Live (shot, receiver) pairs of one swath in recording order: int64 [n]
    position of the shot in firing order and [n] receiver-table row."""
    n_shots, rcv = spec.shots_per_line, tables.receivers
    if spec.max_offset_m is None:
        return np.repeat(np.arange(n_shots), len(rcv)), np.tile(np.arange(len(rcv)), n_shots)
    rows = _firing_order(spec, swath)
    src = tables.sources
    # a source line is straight along y: only receivers within max offset in x can be live
    near = np.flatnonzero(np.abs(rcv.x - src.x[rows[0]]) <= spec.max_offset_m + 1e-9)
    d = np.hypot(src.x[rows, None] - rcv.x[None, near], src.y[rows, None] - rcv.y[None, near])
    shot_pos, col = np.nonzero(d <= spec.max_offset_m + 1e-9)
    return shot_pos, near[col]


def _check_swath(spec: SyntheticSpec, swath: int) -> None:
    if not 0 <= swath < spec.n_swaths:
        raise ConfigError(f"swath = {swath}: this survey has swaths 0 to {spec.n_swaths - 1}")


def n_traces_per_swath(spec: SyntheticSpec, tables: StationTables | None = None) -> list[int]:
    """Trace count of every swath, in swath order."""
    tables = stations(spec) if tables is None else tables
    return [len(_swath_live(spec, tables, s)[0]) for s in range(spec.n_swaths)]


def swath_traces(spec: SyntheticSpec, swath: int, tables: StationTables | None = None) -> TraceGeometry:
    """Geometry of every trace of one swath, in recording order (shot by shot,
    channels in receiver-table order). Field records continue across swaths."""
    _check_swath(spec, swath)
    tables = stations(spec) if tables is None else tables
    shot_pos, rcv = _swath_live(spec, tables, swath)
    starts = np.searchsorted(shot_pos, np.arange(spec.shots_per_line))
    channel = np.arange(len(rcv)) - starts[shot_pos] + 1
    src = _firing_order(spec, swath)[shot_pos]
    s, r = tables.sources, tables.receivers
    return TraceGeometry(
        field_record=(spec.first_field_record + swath * spec.shots_per_line + shot_pos).astype(np.int32),
        channel=channel.astype(np.int32),
        energy_source_point=s.number[src].astype(np.int32),
        source_index=src.astype(np.int32),
        receiver_index=rcv.astype(np.int32),
        source_x=s.x[src], source_y=s.y[src], source_elevation=s.elevation[src],
        receiver_x=r.x[rcv], receiver_y=r.y[rcv], receiver_elevation=r.elevation[rcv],
        offset=np.hypot(s.x[src] - r.x[rcv], s.y[src] - r.y[rcv]),
    )
