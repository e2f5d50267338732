"""The survey config: one typed object, validated when it is loaded.

The model is pure (no file I/O): ``descatter.storage.config_file`` reads and
writes it as TOML. Kernels never receive it; flows pass them plain numbers.

Every field carries a description and a unit, which ``descatter config init``
turns into a commented template, so the template always lists every key.
"""

from __future__ import annotations

from typing import Literal

from pydantic import Field, field_validator, model_validator

from descatter.tasks.config_base import _Section, _unit
from descatter.tasks.geometry_config import GeometryConfig, QcConfig


# Default trace-header byte positions: SEG-Y rev 1 (2002), table 2
# (1-based byte numbers). The width of each field is fixed by the standard.
HEADER_WIDTHS: dict[str, int] = {
    "field_record": 4,
    "channel": 4,
    "energy_source_point": 4,
    "offset": 4,
    "receiver_elevation": 4,
    "source_elevation": 4,
    "elevation_scalar": 2,
    "coordinate_scalar": 2,
    "source_x": 4,
    "source_y": 4,
    "receiver_x": 4,
    "receiver_y": 4,
    "coordinate_units": 2,
    "delay_ms": 2,
    "n_samples": 2,
    "interval_us": 2,
}


class HeaderPositions(_Section):
    """1-based byte position of each decoded trace-header field."""

    field_record: int = Field(9, description="field record number", json_schema_extra=_unit("byte"))
    channel: int = Field(13, description="trace number within the field record", json_schema_extra=_unit("byte"))
    energy_source_point: int = Field(17, description="energy source point number", json_schema_extra=_unit("byte"))
    offset: int = Field(37, description="source-receiver offset", json_schema_extra=_unit("byte"))
    receiver_elevation: int = Field(41, description="receiver group elevation", json_schema_extra=_unit("byte"))
    source_elevation: int = Field(45, description="surface elevation at source", json_schema_extra=_unit("byte"))
    elevation_scalar: int = Field(69, description="scalar applied to elevations", json_schema_extra=_unit("byte"))
    coordinate_scalar: int = Field(71, description="scalar applied to coordinates", json_schema_extra=_unit("byte"))
    source_x: int = Field(73, description="source coordinate X", json_schema_extra=_unit("byte"))
    source_y: int = Field(77, description="source coordinate Y", json_schema_extra=_unit("byte"))
    receiver_x: int = Field(81, description="group coordinate X", json_schema_extra=_unit("byte"))
    receiver_y: int = Field(85, description="group coordinate Y", json_schema_extra=_unit("byte"))
    coordinate_units: int = Field(89, description="coordinate units (1 length, 2 arc seconds, 3 degrees, 4 DMS)", json_schema_extra=_unit("byte"))
    delay_ms: int = Field(109, description="delay recording time", json_schema_extra=_unit("byte"))
    n_samples: int = Field(115, description="number of samples in this trace", json_schema_extra=_unit("byte"))
    interval_us: int = Field(117, description="sample interval of this trace", json_schema_extra=_unit("byte"))

    @model_validator(mode="after")
    def _inside_header(self) -> "HeaderPositions":
        for name, width in HEADER_WIDTHS.items():
            pos = getattr(self, name)
            if not 1 <= pos <= 241 - width:
                raise ValueError(
                    f"ingest.headers.{name} = {pos}: a {width}-byte field must start "
                    f"between byte 1 and {241 - width} of the 240-byte trace header"
                )
        return self

    def layout(self) -> dict[str, tuple[int, int]]:
        """``{field: (1-based byte, width)}`` for every decoded field."""
        return {name: (getattr(self, name), width) for name, width in HEADER_WIDTHS.items()}


class IngestConfig(_Section):
    """How SEG-Y swaths become arrays in the store."""

    chunk_traces: int = Field(
        4000, ge=16, le=1_000_000,
        # 4000 rather than 1000: per-chunk costs (zarr open, flags, task overhead) dominate small
        # chunks; measured on 1e5 traces with groups of 16000, spectra + statistics 6.4 s -> 3.3 s
        description="traces per chunk of every per-trace array",
        json_schema_extra=_unit("traces"),
    )
    compression_level: int = Field(
        # 0 by measurement: lz4 + shuffle made float32 samples only 1.27x smaller, for 1.6x the
        # write and 2.2x the read time of a 24 MB chunk (19 vs 30 ms, 5.7 vs 12.5 ms)
        0, ge=0, le=9, description="blosc lz4 level for trace samples (0 stores raw)",
        json_schema_extra=_unit("level"),
    )
    headers: HeaderPositions = Field(default_factory=HeaderPositions, description="trace-header byte positions")


class AnalysisConfig(_Section):
    """The wave mode the estimation looks at: moveout, window and band."""

    velocity: list[tuple[float, float]] = Field(
        default_factory=lambda: [(0.0, 1800.0), (2.0, 3000.0)],
        description="RMS velocity function for NMO as [t0, vrms] pairs",
        json_schema_extra=_unit("[s, m/s]"),
    )
    window_start_s: float = Field(0.2, ge=0.0, description="analysis window start (after NMO)", json_schema_extra=_unit("s"))
    window_end_s: float = Field(1.2, gt=0.0, description="analysis window end (after NMO)", json_schema_extra=_unit("s"))
    band_hz: tuple[float, float] = Field((8.0, 60.0), description="frequency band of the estimation", json_schema_extra=_unit("Hz"))
    taper_s: float = Field(0.05, ge=0.0, description="cosine taper inside each window edge", json_schema_extra=_unit("s"))
    stretch_mute: float = Field(
        0.5, gt=0.0, description="NMO stretch mute: samples stretched more than this fraction are zeroed",
        json_schema_extra=_unit("fraction"),
    )
    moveout: Literal["nmo", "lmo"] = Field(
        "nmo", description="nmo (reflections, velocity function) or lmo (early arrivals, lmo_velocity_mps)",
        json_schema_extra=_unit("choice"),
    )
    lmo_velocity_mps: float = Field(1500.0, gt=0.0, description="linear-moveout velocity, with moveout = lmo",
                                    json_schema_extra=_unit("m/s"))
    n_fft: int = Field(0, ge=0, description="FFT length of the window; 0 takes the next power of two", json_schema_extra=_unit("samples"))
    near_surface_velocity_mps: float = Field(
        200.0, gt=0.0, description="velocity of the scattering layer, for spacing checks",
        json_schema_extra=_unit("m/s"),
    )

    @field_validator("velocity")
    @classmethod
    def _increasing(cls, value: list[tuple[float, float]]) -> list[tuple[float, float]]:
        if not value:
            raise ValueError("analysis.velocity needs at least one [t0, vrms] pair")
        times = [t for t, _ in value]
        if any(b <= a for a, b in zip(times, times[1:])):
            raise ValueError(f"analysis.velocity t0 values must increase, got {times}")
        if any(v <= 0 for _, v in value):
            raise ValueError("analysis.velocity vrms values must be positive")
        return value

    @model_validator(mode="after")
    def _ordered(self) -> "AnalysisConfig":
        if self.window_end_s <= self.window_start_s:
            raise ValueError(
                f"analysis.window_end_s = {self.window_end_s} must exceed "
                f"window_start_s = {self.window_start_s}"
            )
        lo, hi = self.band_hz
        if not 0 <= lo < hi:
            raise ValueError(f"analysis.band_hz = {list(self.band_hz)}: expected 0 <= low < high")
        return self


class EstimateConfig(_Section):
    """Station pairs, solver terms and filter design of the estimation."""

    receiver_radius_m: float = Field(
        60.0, gt=0.0, description="receiver pairs: neighbours within this distance (just above the line spacing)",
        json_schema_extra=_unit("m"),
    )
    source_radius_m: float = Field(
        90.0, gt=0.0, description="source pairs: neighbours within this distance", json_schema_extra=_unit("m"))
    bridge_components: bool = Field(
        True, description="join a station graph that falls apart with its nearest cross-component pairs",
        json_schema_extra=_unit("switch"),
    )
    offset_bin_m: float = Field(50.0, gt=0.0, description="offset bin of the amplitude solve's offset term",
                                json_schema_extra=_unit("m"))
    cmp_bin_m: float = Field(0.0, ge=0.0, le=0.0,
                             description="CMP bin of a CMP term in the amplitude solve; must be 0 for now (the "
                                         "statistics do not yet carry survey-wide CMP bins)",
                             json_schema_extra=_unit("m"))
    min_pairs: int = Field(3, ge=1, description="stations with fewer pairs get the identity filter",
                           json_schema_extra=_unit("pairs"))
    smoothing_hz: float = Field(
        2.0, ge=0.0,
        description="half-width of the triangular smoothing of the pair sums over frequency before the solves "
                    "(a lag window sinc^2 on the pair cross-correlations, half height near 0.44 / smoothing_hz s: "
                    "keep that longer than the station filters' coda); 0 for none",
        json_schema_extra=_unit("Hz"),
    )
    phase_method: Literal["laplacian", "eigen"] = Field(
        "laplacian", description="phase solve: pinned connection Laplacian or leading eigenvector",
        json_schema_extra=_unit("choice"),
    )
    filter_length_s: float = Field(0.4, gt=0.0, description="longest station filter in time", json_schema_extra=_unit("s"))
    filter_lead_s: float = Field(0.064, ge=0.0, description="filter time before zero (negative delays)",
                                 json_schema_extra=_unit("s"))
    shot_group_traces: int = Field(
        16000, ge=100, description="traces per statistics task (whole shots or receivers)",
        json_schema_extra=_unit("traces"))


class CorrectionConfig(_Section):
    """How station filters become corrections applied to every trace."""

    mode: Literal["full", "phase"] = Field(
        "full", description="full (amplitude and phase) or phase (phase only)", json_schema_extra=_unit("choice"))
    prewhitening_mode: Literal["measured", "fixed"] = Field(
        "measured",
        description="measured: eps(f) per frequency from the noise-to-signal power ratio the estimate measured "
                    "in the pair coherence (a Wiener filter); fixed: one fraction, prewhitening, at every frequency",
        json_schema_extra=_unit("choice"),
    )
    prewhitening: float = Field(
        0.1, ge=0.0,
        description="fixed mode, and solutions estimated without a measured noise level: eps of "
                    "conj(H) / (|H|^2 + eps) as a fraction of the trace's mean in-band |H|^2; about the "
                    "noise-to-signal power ratio (measured best on the synthetic survey)",
        json_schema_extra=_unit("fraction"),
    )
    prewhitening_scale: float = Field(
        1.0, ge=0.0,
        description="measured mode: eps(f) = prewhitening_scale x measured noise-to-signal ratio(f) x the trace's "
                    "mean in-band |H|^2 (1 is the Wiener filter; measured best on the demo survey)",
        json_schema_extra=_unit("factor"),
    )
    band_taper_hz: float = Field(
        5.0, ge=0.0, description="transition from the correction in the band to identity outside it",
        json_schema_extra=_unit("Hz"),
    )
    shaping_hz: tuple[float, ...] = Field(
        (), description="optional target band [f1, f2, f3, f4]: the corrected traces are shaped to this trapezoid "
                        "(0 below f1, raised-cosine flanks, 1 from f2 to f3, 0 above f4); empty: no shaping",
        json_schema_extra=_unit("Hz"),
    )
    reapply_tolerance: float = Field(
        0.02, ge=0.0,
        description="a new solution re-corrects only traces whose source or receiver filter changed by more than "
                    "this relative RMS (|f_new - f_applied| / |f_applied|); 0 re-corrects every changed filter",
        json_schema_extra=_unit("fraction"),
    )


    @model_validator(mode="after")
    def _check_shaping(self):
        t = self.shaping_hz
        if t and not (len(t) == 4 and 0 <= t[0] < t[1] <= t[2] < t[3]):
            raise ValueError(f"correction.shaping_hz = {list(t)}: expected [] or four corners f1 < f2 <= f3 < f4 (Hz)")
        return self


class SurveyConfig(_Section):
    """Everything a survey run can be told. Sections mirror the stages."""

    ingest: IngestConfig = Field(default_factory=IngestConfig, description="SEG-Y ingest")
    geometry: GeometryConfig = Field(default_factory=GeometryConfig, description="stations, shots and geometry checks")
    qc: QcConfig = Field(default_factory=QcConfig, description="trace QC policies and exclusions")
    analysis: AnalysisConfig = Field(default_factory=AnalysisConfig, description="analysis window and band")
    estimate: EstimateConfig = Field(default_factory=EstimateConfig, description="station pairs, solves and filters")
    correction: CorrectionConfig = Field(default_factory=CorrectionConfig, description="correction filters")

