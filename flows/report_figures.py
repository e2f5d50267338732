"""Figures of the QC report, built on matplotlib's object API (Agg canvas,
no display, no pyplot state, fixed margins). Each function takes plain arrays (as written
to metrics.json) and returns a :class:`matplotlib.figure.Figure`; only
display scaling (clips, decibels relative to a maximum) happens here.
"""

from __future__ import annotations

import numpy as np
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.ticker import MaxNLocator

SNR_DISPLAY_FLOOR = 1e-3  # S/N of 0 (semblance <= 1/N) drawn at this value on log axes


def _grid(**margins) -> dict:
    # fixed margins instead of a layout engine: constrained layout doubled
    # the rendering time of these figures (measured, about 1.7 s -> 0.8 s)
    return margins


def _plain_axes(ax) -> None:
    ax.ticklabel_format(useOffset=False, style="plain")
    ax.xaxis.set_major_locator(MaxNLocator(4))
    ax.yaxis.set_major_locator(MaxNLocator(5))
    ax.set_aspect("equal", adjustable="datalim")
    ax.set_xlabel("x (m)")
    ax.set_ylabel("y (m)")


_MAP_STYLE = {  # attribute -> (colour map, symmetric about zero)
    "scattering_fraction": ("viridis", False),
    "static_ms": ("RdBu_r", True),
    "amplitude_db": ("RdBu_r", True),
    "coherence": ("viridis", False),
    "pairs": ("cividis", False),
}


def station_map_figure(kind: str, x, y, attributes: dict, *, identity) -> Figure:
    """One map per attribute of one station kind. ``attributes``: name ->
    (title, unit, values [n]); identity bool [n] (drawn as black crosses,
    left out of the colour range)."""
    x, y = np.asarray(x, float), np.asarray(y, float)
    identity = np.asarray(identity, bool)
    fig = Figure(figsize=(15, 9.5))
    axes = fig.subplots(2, 3, gridspec_kw=_grid(left=0.07, right=0.97, bottom=0.06, top=0.92, wspace=0.55,
                                                 hspace=0.28)).ravel()
    for ax, (name, (title, unit, values)) in zip(axes, attributes.items()):
        v = np.asarray(values, float)
        cmap, symmetric = _MAP_STYLE.get(name, ("viridis", False))
        ref = v[~identity & np.isfinite(v)]
        if ref.size:
            lo, hi = (float(ref.min()), float(ref.max()))
            if symmetric:
                m = max(abs(lo), abs(hi), 1e-9)
                lo, hi = -m, m
        else:
            lo, hi = 0.0, 1.0
        ok = ~identity
        sc = ax.scatter(x[ok], y[ok], c=v[ok], cmap=cmap, vmin=lo, vmax=hi if hi > lo else lo + 1e-9, s=28,
                        edgecolors="none")
        ax.scatter(x[identity], y[identity], marker="x", c="k", s=40, linewidths=1.2)
        fig.colorbar(sc, ax=ax, shrink=0.9, pad=0.03, label=f"{title} ({unit})")
        ax.set_title(f"{kind} {title}")
        _plain_axes(ax)
    for ax in axes[len(attributes):]:
        ax.axis("off")
    handles = [Line2D([], [], ls="", marker="o", mfc="tab:green", mec="none",
                      label=f"{kind} station, coloured by value ({int((~identity).sum())})"),
               Line2D([], [], ls="", marker="x", mec="k", mew=1.2,
                      label=f"identity filter: too few pairs, not corrected ({int(identity.sum())})")]
    axes[-1].legend(handles=handles, loc="center", title="legend", frameon=True)
    fig.suptitle(f"{kind} stations of the solution ({len(x)} stations, {int(identity.sum())} with identity filter)")
    return fig


def pair_panels_figure(panels: list[dict]) -> Figure:
    """Per-shot cross-correlations of receiver pairs, before | after, one
    row of the image per shot, one row of panels per pair."""
    n = len(panels)
    height = 3.2 * n + 0.8
    fig = Figure(figsize=(12, height))
    axes = fig.subplots(n, 2, squeeze=False, gridspec_kw=_grid(left=0.09, right=0.99, bottom=0.5 / height,
                                                                top=1 - 0.8 / height, wspace=0.12, hspace=0.5))
    for row, p in zip(axes, panels):
        lags = np.asarray(p["lags_ms"], float)
        m = max(float(np.max(np.abs(p["before"]))), float(np.max(np.abs(p["after"]))), 1e-9)
        n_shots = len(p["shots"])
        (a, b), (fa, fb) = p["receiver_rows"], p["scattering_fraction"]
        for ax, side in zip(row, ("before", "after")):
            im = ax.imshow(np.asarray(p[side]), aspect="auto", cmap="RdBu_r", vmin=-m, vmax=m,
                           extent=(lags[0], lags[-1], n_shots + 0.5, 0.5), interpolation="nearest")
            ax.axvline(0.0, color="k", lw=0.5, ls=":")
            ax.set_title(f"{side} correction: repeatability {p[f'{side}_repeatability']:.2f}, "
                         f"mean peak {p[f'{side}_peak']:.2f} at {p[f'{side}_peak_lag_ms']:+.0f} ms", fontsize=9)
            ax.set_xlabel("lag (ms): positive = first receiver later")
        row[0].set_ylabel(f"receivers #{a} & #{b}, {p['group']}\nfractions {fa:.2f} / {fb:.2f}\nshot (row)")
        fig.colorbar(im, ax=list(row), shrink=0.9, pad=0.015, label="normalised correlation")
    fig.suptitle("Receiver-pair cross-correlations per shot, NMO corrected, analysis window and band")
    return fig


def gather_figure(gather: dict, *, dt_s: float, window_s: tuple[float, float]) -> Figure:
    """One shot after NMO, band limited, before | after (each clipped at its
    own 98th percentile of |amplitude|)."""
    fig = Figure(figsize=(12, 6))
    axes = fig.subplots(1, 2, sharey=True, gridspec_kw=_grid(left=0.06, right=0.97, bottom=0.09, top=0.88,
                                                             wspace=0.12))
    for ax, side in zip(axes, ("before", "after")):
        d = np.asarray(gather[side], float)
        clip = float(np.percentile(np.abs(d), 98)) or 1.0
        n, ns = d.shape
        im = ax.imshow(d.T, aspect="auto", cmap="gray_r", vmin=-clip, vmax=clip, interpolation="bilinear",
                       extent=(0.5, n + 0.5, (ns - 1) * dt_s, 0.0))
        for t in window_s:
            ax.axhline(t, color="tab:red", lw=0.8, ls="--")
        ax.set_title(f"{side} correction (clip {clip:.3g})")
        ax.set_xlabel("trace in shot (file order)")
        fig.colorbar(im, ax=ax, shrink=0.8, pad=0.02, label="amplitude (as recorded)")
    axes[0].set_ylabel("t0 (s) after NMO")
    fig.suptitle(f"Shot {gather['shot']} of swath {gather['swath']}: the source of highest scattering fraction "
                 f"({gather['scattering_fraction']:.2f}); dashed: analysis window")
    return fig


def spectra_figure(freqs_hz, before, after, *, band_hz: tuple[float, float]) -> Figure:
    """Mean amplitude spectra in dB relative to the maximum before correction."""
    fig = Figure(figsize=(9, 4.5))
    ax = fig.subplots(gridspec_kw=_grid(left=0.09, right=0.97, bottom=0.12, top=0.91))
    f = np.asarray(freqs_hz, float)
    ref = float(np.max(before)) if np.size(before) and np.max(before) > 0 else 1.0
    with np.errstate(divide="ignore"):
        for values, label, style in ((before, "before", "-"), (after, "after", "-")):
            ax.plot(f, 20 * np.log10(np.maximum(np.asarray(values, float), 1e-12) / ref), style, label=label)
    ax.axvspan(*band_hz, color="0.9", zorder=0, label="analysis band")
    ax.set_ylim(bottom=-60)
    ax.set_xlabel("frequency (Hz)")
    ax.set_ylabel("mean amplitude (dB re max before)")
    ax.set_title("Mean amplitude spectra of the NMO-corrected analysis windows")
    ax.legend()
    ax.grid(alpha=0.3)
    return fig


def _floor(v) -> np.ndarray:
    return np.clip(np.asarray(v, float), SNR_DISPLAY_FLOOR, None)


def snr_figure(shots: dict, cmp: dict) -> Figure:
    """Per-shot S/N before against after, and the CMP-bin S/N histograms."""
    fig = Figure(figsize=(12, 5))
    ax, hx = fig.subplots(1, 2, gridspec_kw=_grid(left=0.07, right=0.98, bottom=0.11, top=0.87, wspace=0.22))
    b, a = _floor(shots["snr_before"]), _floor(shots["snr_after"])
    zone = np.asarray(shots["high_scattering"], bool)
    finite = np.concatenate([b, a])
    finite = finite[np.isfinite(finite)]
    lim = (SNR_DISPLAY_FLOOR, max(float(finite.max()) * 2 if finite.size else 10.0, 1.0))
    ax.scatter(b[~zone], a[~zone], s=18, label="shots")
    ax.scatter(b[zone], a[zone], s=26, marker="^", c="tab:red", label="high-scattering zone (top quartile)")
    ax.plot(lim, lim, "k:", lw=0.8, label="no change")
    ax.set(xscale="log", yscale="log", xlim=lim, ylim=lim, xlabel="S/N before (power ratio)",
           ylabel="S/N after (power ratio)", title="S/N per shot gather")
    ax.legend(fontsize=8)
    cb, ca = _floor(cmp["snr_before"]), _floor(cmp["snr_after"])
    values = np.concatenate([cb, ca])
    values = values[np.isfinite(values)]
    if values.size:
        edges = np.logspace(np.log10(max(values.min(), SNR_DISPLAY_FLOOR)), np.log10(values.max() * 1.01 + 1e-9), 30)
        hx.hist(cb[np.isfinite(cb)], bins=edges, alpha=0.6, label="before")
        hx.hist(ca[np.isfinite(ca)], bins=edges, alpha=0.6, label="after")
        hx.set_xscale("log")
        hx.legend()
    hx.set(xlabel="S/N (power ratio)", ylabel="CMP bins",
           title=f"S/N per CMP bin ({len(cb)} bins of fold >= {cmp['min_fold']})")
    fig.suptitle(f"S/N from semblance, analysis window and band (0 drawn at {SNR_DISPLAY_FLOOR:g})")
    return fig


def snr_map_figure(shots: dict, receiver_x, receiver_y) -> Figure:
    """S/N after / before (dB) at each shot's source position."""
    fig = Figure(figsize=(8, 7))
    ax = fig.subplots(gridspec_kw=_grid(left=0.13, right=0.98, bottom=0.08, top=0.94))
    ax.scatter(receiver_x, receiver_y, s=4, c="0.75", label="receivers")
    gain = np.asarray(shots["snr_gain_db"], float)
    m = max(float(np.nanmax(np.abs(gain))) if gain.size else 1.0, 1e-9)
    zone = np.asarray(shots["high_scattering"], bool)
    sc = ax.scatter(shots["x"], shots["y"], c=gain, cmap="RdBu_r", vmin=-m, vmax=m, s=60,
                    edgecolors=np.where(zone, "k", "none"), linewidths=1.2)
    fig.colorbar(sc, ax=ax, shrink=0.8, label="S/N after / before (dB)")
    handles = [Line2D([], [], ls="", marker="o", mfc="0.75", mec="none", label="receivers"),
               Line2D([], [], ls="", marker="o", mfc="w", mec="k", label="shot in high-scattering zone")]
    ax.legend(handles=handles, loc="upper right", fontsize=8)
    _plain_axes(ax)
    ax.set_title("S/N change per shot gather, at the source position")
    return fig


def spacing_figure(spacing: dict) -> Figure:
    """Largest unaliased spacing v / (2 f) over the band against the
    receiver and source station spacing."""
    fig = Figure(figsize=(9, 5))
    ax = fig.subplots(gridspec_kw=_grid(left=0.09, right=0.97, bottom=0.11, top=0.92))
    curve = spacing["curve"]
    f = np.asarray(curve["freqs_hz"], float)
    for v, row in zip(curve["velocities_mps"], np.asarray(curve["nyquist_spacing_m"], float)):
        ax.plot(f, row, label=f"half wavelength at {v:g} m/s")
    for kind, colour, style in (("receiver", "tab:red", "--"), ("source", "tab:purple", ":")):
        s = spacing[kind]["station_spacing_m"]
        if s is not None and np.isfinite(s):
            state = "aliased" if spacing[kind]["aliased"] else "unaliased"
            ax.axhline(s, color=colour, ls=style, lw=2, label=f"{kind} spacing {s:g} m ({state})")
    ax.set(yscale="log", xlabel="frequency (Hz)", ylabel="station spacing (m)",
           title="Station spacing against the near-surface wavelength (spacing must be below the curve)")
    ax.grid(alpha=0.3, which="both")
    ax.legend(fontsize=8)
    return fig


def truth_correlation_figure(truth: dict) -> Figure:
    """Histograms of the per-trace correlation with the clean truth, before
    and after correction, over the traces used and in the high-scattering
    zone (``truth``: metrics.json's ``truth_comparison``)."""
    fig = Figure(figsize=(9, 4.5))
    ax = fig.subplots(gridspec_kw=_grid(left=0.09, right=0.97, bottom=0.12, top=0.91))
    for where, side, label, style in (("survey", "before", "before", "-"), ("survey", "after", "after", "-"),
                                      ("high_scattering_zone", "after", "after, high-scattering zone", "--")):
        d = truth[where][side]
        ax.stairs(np.asarray(d["counts"], float), np.asarray(d["edges"], float), ls=style, lw=1.5,
                  label=f"{label} (median {d['median']:.3f})" if d["count"] else label)
    ax.set(xlim=(-1, 1), xlabel="zero-lag correlation with the clean truth", ylabel="traces",
           title=f"Corrected traces against the synthetic truth ({truth['traces']} traces)")
    ax.legend(loc="upper left", fontsize=8)
    ax.grid(alpha=0.3)
    return fig
