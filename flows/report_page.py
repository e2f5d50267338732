"""The HTML page of the QC report: text, tables and the figures by file name.

Built from the metrics document alone (the same numbers metrics.json
holds), so the page never says what the file does not.
"""

from __future__ import annotations

import html
import math

CAUTION = (
    "Caution: these results must be reviewed by a qualified geophysicist before they are used. "
    "They do not replace local regulations or licensed professional practice, which take precedence."
)

SEMBLANCE_DEFINITION = (
    "Semblance (Neidell &amp; Taner 1971) of a gather of N live traces a<sub>i</sub>(t), NMO corrected and "
    "band limited, over the analysis window W: S = &Sigma;<sub>t&isin;W</sub> (&Sigma;<sub>i</sub> "
    "a<sub>i</sub>(t))<sup>2</sup> / (N &Sigma;<sub>t&isin;W</sub> &Sigma;<sub>i</sub> a<sub>i</sub>(t)<sup>2</sup>)."
)
SNR_DEFINITION = (
    "S/N is the power signal-to-noise ratio that semblance S implies for N traces of one signal plus "
    "independent noise of equal power: S/N = (N S &minus; 1) / (N (1 &minus; S)), and 0 when S &le; 1/N "
    "(nothing above the noise). Shots use their live trace count as N, CMP bins their fold."
)

TRUTH_DEFINITION = (
    "Correlation with the truth: on a synthetic survey each trace has a clean truth b(t), the same trace "
    "synthesised without station filters and without noise. Both it and the trace a(t) are NMO corrected and "
    "band limited as for the semblance, and compared over the analysis window W at zero lag: "
    "c = &Sigma;<sub>t&isin;W</sub> a(t) b(t) / (&Sigma;<sub>t&isin;W</sub> a(t)<sup>2</sup> "
    "&Sigma;<sub>t&isin;W</sub> b(t)<sup>2</sup>)<sup>1/2</sup>, with no time shift or scale fitted "
    "(1: the trace is the truth up to a positive factor). Before: the input traces; after: the corrected ones."
)

_STYLE = """
body { font-family: sans-serif; max-width: 1200px; margin: 1em auto; padding: 0 1em; color: #222; }
.caution { border: 3px solid #a00; background: #fee; padding: 0.8em 1em; font-weight: bold; font-size: 1.1em; }
.warning { border: 2px solid #c60; background: #fff3e0; padding: 0.6em 1em; margin: 0.6em 0; }
.note { background: #eef; padding: 0.5em 1em; }
table { border-collapse: collapse; margin: 0.5em 0; }
td, th { border: 1px solid #bbb; padding: 0.2em 0.6em; text-align: right; }
th { background: #eee; } td.l, th.l { text-align: left; }
img { max-width: 100%; border: 1px solid #ddd; }
"""


def _fmt(value, digits: int = 3) -> str:
    if value is None:
        return "n/a"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        return "n/a" if not math.isfinite(value) else f"{value:.{digits}g}"
    return html.escape(str(value))


def _table(header: list[str], rows: list[list]) -> str:
    head = "".join(f"<th>{html.escape(h)}</th>" for h in header)
    body = "".join("<tr>" + "".join(f"<td>{_fmt(v)}</td>" for v in r) + "</tr>" for r in rows)
    return f"<table><tr>{head}</tr>{body}</table>"


def _figure(files: dict, name: str, caption: str) -> str:
    if name not in files:
        return f"<p class='note'>No figure: {html.escape(caption)}</p>"
    return (f"<figure><img src='{html.escape(files[name])}' alt='{html.escape(caption)}'>"
            f"<figcaption>{caption}</figcaption></figure>")


def _spacing_warnings(doc: dict) -> list[str]:
    out = []
    for kind in ("receiver", "source"):
        w = doc["spacing"][kind].get("warning")
        if w and doc["spacing"][kind].get("aliased"):
            out.append(f"<div class='warning'><b>{kind.capitalize()} spacing:</b> {html.escape(w)}</div>")
    return out


def _truth_section(doc: dict, files: dict) -> list[str]:
    t = doc.get("truth_comparison") or {}
    if not t.get("available"):
        reason = t.get("reason", "no truth")
        return [f"<p class='note'>No comparison with a synthetic truth: {html.escape(reason)}.</p>"]
    rows = []
    for where, label in (("survey", "traces used"), ("high_scattering_zone", "high-scattering zone"),
                         ("outside_zone", "outside the zone")):
        b, a = t[where]["before"], t[where]["after"]
        rows.append([label, a["count"], b["median"], a["median"], a["q10"], a["q25"], a["q75"], a["q90"]])
    scope = ("every trace of the survey" if not doc["sampling"]["sampled"] else
             f"the {t['traces']} traces of the sampled shots")
    return ["<h2>Comparison with the synthetic truth</h2>",
            f"<p>Truth file {html.escape(str(t['file']))}; {scope}. Median correlation with the truth: "
            f"<b>{_fmt(t['survey']['before']['median'])} before, {_fmt(t['survey']['after']['median'])} after "
            f"correction</b>.</p>",
            _table(["traces", "count", "median before", "median after", "after: 10%", "25%", "75%", "90%"], rows),
            f"<p>{TRUTH_DEFINITION} The high-scattering zone holds the traces of the zone's shots.</p>",
            _figure(files, "truth_correlation", "correlation with the truth before and after")]


def build_page(doc: dict, files: dict[str, str]) -> str:
    """index.html from the metrics document and the figures' file names."""
    s, a, samp = doc["summary"], doc["analysis"], doc["sampling"]
    parts = [f"<div class='caution'>{html.escape(CAUTION)}</div>",
             f"<h1>Near-surface scattering QC: solution {html.escape(doc['solution'])}</h1>"]
    parts += _spacing_warnings(doc)
    if doc["corrected_with"] != [doc["solution"]]:
        parts.append(f"<div class='warning'>The corrected traces were made with solution(s) "
                     f"{html.escape(', '.join(map(str, doc['corrected_with'])))}, not {html.escape(doc['solution'])}: "
                     f"the after-correction figures show that correction.</div>")
    if samp["sampled"]:
        parts.append(f"<div class='warning'>Trace metrics use {samp['shots_used']} of {samp['shots_total']} shots "
                     f"({samp['traces_used']} of {samp['traces_total']} live traces): whole shots spread evenly "
                     f"over the survey, at most {samp['max_traces']} traces. Station maps use the whole "
                     f"solution; the pair panels and the shot gather read their own few traces.</div>")
    else:
        parts.append(f"<p class='note'>Trace metrics use every shot ({samp['shots_total']} shots, "
                     f"{samp['traces_used']} live traces).</p>")
    corr = doc["correction"]
    parts.append("<h2>Run</h2>" + _table(["item", "value"], [
        ["store", doc["store"]], ["solution", doc["solution"]], ["solution created", doc.get("created")],
        ["correction", f"{corr.get('mode')}, prewhitening {corr.get('prewhitening')}"],
        ["analysis window", f"{a['window_s'][0]:g} - {a['window_s'][1]:g} s after {a['moveout'].upper()}"],
        ["analysis band", f"{a['band_hz'][0]:g} - {a['band_hz'][1]:g} Hz (flanks {a['band_taper_hz']:g} Hz)"],
        ["high-scattering zone", f"shots whose source scattering fraction is in the top quartile "
                                 f"(>= {_fmt(doc['high_scattering_zone']['source_fraction_threshold'])})"],
    ]))
    rows = []
    for where, label in (("survey", "whole survey"), ("high_scattering_zone", "high-scattering zone")):
        v = s[where]
        rows.append([label, v["shots"], v["mean_semblance_before"], v["mean_semblance_after"], v["semblance_ratio"],
                     v["median_snr_before"], v["median_snr_after"]])
    parts.append("<h2>Headline numbers</h2>" + _table(
        ["shots", "count", "mean semblance before", "mean semblance after", "after / before",
         "median S/N before", "median S/N after"], rows))
    parts.append(f"<p>{SEMBLANCE_DEFINITION} {SNR_DEFINITION}</p>")
    parts += _truth_section(doc, files)

    parts.append("<h2>Station maps</h2><p>Attributes of the solution's station filters in survey coordinates. "
                 "Stations with too few pairs carry the identity filter and are drawn as black crosses. "
                 "Scattering fraction: one minus the fraction of the filter's in-band energy a single delayed "
                 "spike explains.</p>")
    parts.append(_figure(files, "stations_sources", "source station maps"))
    parts.append(_figure(files, "stations_receivers", "receiver station maps"))

    parts.append("<h2>Receiver-pair correlations</h2><p>For two receiver pairs of lowest and two of highest "
                 "scattering fraction: the cross-correlation of the two receivers' traces in each shot "
                 "(NMO corrected, band limited, tapered analysis window), one row per shot. A distortion that is "
                 "the same in every row belongs to the stations, not to noise: that is what the correction "
                 "removes. Repeatability: mean correlation of each row with the sum of the others.</p>")
    parts.append(_figure(files, "pair_correlations", "pair cross-correlations before and after"))
    prow = [[p["group"], f"#{p['receiver_rows'][0]} / #{p['receiver_rows'][1]}",
             f"{p['receivers'][0]} / {p['receivers'][1]}",
             f"{p['scattering_fraction'][0]:.3f} / {p['scattering_fraction'][1]:.3f}", len(p["shots"]),
             p["before_repeatability"], p["after_repeatability"], p["before_peak"], p["after_peak"]]
            for p in doc["pair_panels"]]
    parts.append(_table(["group", "rows", "station keys", "scattering fractions", "shots", "repeatability before",
                         "after", "mean peak before", "after"], prow))

    g = doc.get("shot_gather")
    parts.append("<h2>Shot gather and spectra</h2>")
    if g:
        parts.append(f"<p>Shot {g['shot']} of swath {html.escape(g['swath'])} ({g['n_traces']} live traces), fired "
                     f"at the source of highest scattering fraction ({g['scattering_fraction']:.3f}), after NMO in "
                     f"the analysis band, before and after correction.</p>")
    parts.append(_figure(files, "shot_gather", "shot gather after NMO, before and after"))
    parts.append(_figure(files, "spectra", "mean amplitude spectra before and after"))

    parts.append("<h2>Signal-to-noise</h2><p>Per shot gather and per CMP bin "
                 f"({doc['cmp_bins']['bin_m'][0]:g} x {doc['cmp_bins']['bin_m'][1]:g} m, bins of fold below "
                 f"{doc['cmp_bins']['min_fold']} left out: {doc['cmp_bins']['bins_below_min_fold']}), in the "
                 f"analysis window after NMO and band limiting. {SNR_DEFINITION}</p>")
    parts.append(_figure(files, "snr", "S/N before and after"))
    parts.append(_figure(files, "snr_map", "map of S/N change by shot position"))

    parts.append("<h2>Acquisition adequacy</h2>")
    parts += _spacing_warnings(doc)
    srow = []
    for kind in ("receiver", "source"):
        c = doc["spacing"][kind]
        srow.append([kind, c.get("station_spacing_m"), c.get("line_spacing_m"), c.get("velocity_mps"),
                     c.get("wavelength_min_m"), c.get("nyquist_spacing_m"), c.get("highest_unaliased_hz"),
                     c.get("aliased")])
    parts.append(_table(["stations", "spacing (m)", "line spacing (m)", "near-surface velocity (m/s)",
                         "shortest wavelength (m)", "largest unaliased spacing (m)", "unaliased up to (Hz)",
                         "aliased"], srow))
    parts.append("<p>Near-surface velocities of about 100-300 m/s in the top metres are common practice, "
                 "giving wavelengths of about 1-5 m there; the spacing must be at most half the shortest "
                 "wavelength in the band.</p>")
    parts.append(_figure(files, "spacing", "station spacing against the near-surface wavelength"))
    parts.append("<p>Every number behind these figures is in <a href='metrics.json'>metrics.json</a>.</p>")
    body = "\n".join(parts)
    return (f"<!DOCTYPE html>\n<html lang='en'><head><meta charset='utf-8'>"
            f"<title>QC report {html.escape(doc['solution'])}</title><style>{_STYLE}</style></head>"
            f"<body>\n{body}\n</body></html>\n")
