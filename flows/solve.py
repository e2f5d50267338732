"""Estimation, part 2: the global solve and the station filters.

Statistics of every swath (and swath pair) are summed in manifest order
and the pair sums smoothed over frequency (``estimate.smoothing_hz``);
the amplitude solve runs once for all frequencies (its spectral shapes then
refined from the pair magnitudes); the phase solves run in
frequency blocks mapped across the workers; the station filters and their
attributes become a solution under ``solutions/<id>``.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field

import numpy as np

from descatter.flows.estimate import lps_from_arrays
from descatter.storage.estimation import has_stats, read_solution, read_stats
from descatter.storage.stations import read_stations
from descatter.storage.store import SurveyStore
from descatter.tasks import station_filters as sf
from descatter.tasks.amplitude_solve import amplitude_solve, pair_amplitude_solve
from descatter.tasks.config import SurveyConfig
from descatter.tasks.pairs import smooth_pair_sums
from descatter.tasks.phase_sync import concat_phase_solutions, phase_sync
from descatter.tasks.statistics import LogPowerSums, PairSums
from descatter.tasks.statistics import coherence_totals, noise_to_signal

log = logging.getLogger(__name__)

FREQ_BLOCK = 8  # frequencies per phase-solve task
# Part of every solution's inputs fingerprint: bump it when the solve's
# method changes, so an unchanged-inputs rerun does not keep an old answer.
SOLVE_VERSION = 5


@dataclass
class Totals:
    receiver_pairs: PairSums
    source_pairs: PairSums
    log_power: LogPowerSums
    keys: list[str] = field(default_factory=list)


def load_totals(store: SurveyStore) -> Totals:
    """Sum every swath's statistics (and swath pairs') in manifest order:
    per swath its own receiver pairs, its own source pairs, then the source
    pairs it shares with each earlier swath. Pair sums are read one part at
    a time (only the pair tables of all parts are held together)."""
    names = store.swath_names()
    keys, source_keys = [], []
    lp = None
    for i, name in enumerate(names):
        keys.append(name)
        source_keys.append(name)
        for prev in names[:i]:
            key = f"{prev}+{name}"
            if has_stats(store.path, key, "source_pairs"):
                source_keys.append(key)
                keys.append(key)
        l = lps_from_arrays(read_stats(store.path, name, "log_power"))
        lp = l if lp is None else lp + l
    n_freq = lp.sum_sq.shape[0] if lp is not None else 0

    def total(group: str, parts: list[str]) -> PairSums:
        tables = [read_stats(store.path, k, group, names=("pairs",))["pairs"] for k in parts]
        return PairSums.total(tables, lambda i: PairSums.from_arrays(read_stats(store.path, parts[i], group)), n_freq)

    return Totals(total("receiver_pairs", names), total("source_pairs", source_keys), lp, keys)


def _phase_weight(p: PairSums) -> np.ndarray:
    """Coherence x shot count: pairs seen by many shots, coherently, count most."""
    return p.coherence() * p.count[:, None]


def _phases(client, pairs: PairSums, n_stations: int, method: str, initial: np.ndarray | None = None):
    weight = _phase_weight(pairs)
    n_freq = pairs.n_freq
    blocks = [slice(a, min(a + FREQ_BLOCK, n_freq)) for a in range(0, n_freq, FREQ_BLOCK)]
    if client is None or len(blocks) == 1:
        return phase_sync(pairs.pairs, pairs.cross, weight, n_stations=n_stations, method=method, initial=initial)
    p_f, c_f, w_f = client.scatter([pairs.pairs, pairs.cross, weight], hash=False)
    i_f = None if initial is None else client.scatter(initial, hash=False)
    futures = [client.submit(phase_sync, p_f, c_f, w_f, n_stations=n_stations, method=method, columns=b,
                             initial=i_f, pure=False) for b in blocks]
    return concat_phase_solutions(client.gather(futures))


def warm_start(store: SurveyStore, freqs: np.ndarray, sizes: dict[str, int]) -> dict[str, np.ndarray]:
    """Unit phases of the current solution, per station kind, padded with
    zeros for stations it did not have: the starting point of the iterative
    phase solve. Empty when there is no current solution on these frequencies."""
    from descatter.storage.estimation import list_solutions

    current = store.attrs.get("current_solution")
    if not current or current not in list_solutions(store):
        return {}
    _, sol, _ = read_solution(store, current, names=("freq_hz", "source_response", "receiver_response"))
    if sol["freq_hz"].shape != freqs.shape or not np.allclose(sol["freq_hz"], freqs):
        return {}
    out = {}
    for kind, n in sizes.items():
        r = sol[f"{kind}_response"].astype(np.complex128)[:n]
        z = np.zeros((n, len(freqs)), np.complex128)
        mag = np.abs(r)
        z[: len(r)] = np.where(mag > 0, r / np.where(mag > 0, mag, 1.0), 0.0)
        out[kind] = z
    return out


def station_attributes(kind: str, amp_term: np.ndarray, phase, pairs: PairSums, n: int, freqs: np.ndarray,
                       config: SurveyConfig, dt_s: float, n_fft: int) -> dict:
    """Response, filter and attributes of one station kind."""
    est = config.estimate
    count = sf.pair_counts(pairs.pairs, pairs.count, n)
    identity = sf.identity_mask(count, min_pairs=est.min_pairs) | phase.isolated
    # identity stations take no part in the gauge (zero mean per component)
    gauge = np.where(identity, -1, phase.component)
    # The response and the filters keep the solve's gauge (mean phase zero per
    # frequency): it lines the corrected traces up with zero-mean statics,
    # which a smoothed common phase did not (measured on the demo survey: the
    # corrected traces came out 20-48 ms off the truth, zero-lag correlation
    # 0.57 with this gauge, -0.22 and 0.02 with the smooth ones).
    response = sf.station_response(amp_term, phase.z)
    # The single-spike scattering fraction is read under a common phase that
    # varies smoothly with frequency (sf.smooth_gauge notes: receiver rank
    # 0.57 -> 0.73 on the demo survey); relative filters are the same in both.
    ranked = sf.smooth_gauge(response, freqs_hz=freqs, component=gauge)
    response[identity] = 1.0
    weight = np.ones(len(freqs))
    out = {
        "response": response.astype(np.complex64),
        "static_ms": np.where(identity, 0.0, sf.static_from_phase(response, freqs_hz=freqs, weight=weight,
                                                                     component=gauge) * 1e3),
        "amplitude_db": np.where(identity, 0.0, sf.amplitude_db(amp_term, weight=weight, component=gauge)),
        "scattering_fraction": np.where(identity, 0.0,
                                        sf.scattering_fraction(ranked, freqs_hz=freqs, weight=weight)),
        "coherence": sf.station_coherence(pairs.pairs, pairs.coherence(), n),
        "pairs": count,
        "residual": phase.station_residual.mean(axis=1) if phase.station_residual.size else np.zeros(n),
        "component": phase.component,
        "identity": identity,
        "filter": sf.time_filters(response, freqs_hz=freqs, n_fft=n_fft, dt_s=dt_s,
                                  max_length_s=est.filter_length_s, lead_s=est.filter_lead_s).astype(np.float32),
    }
    return {f"{kind}_{k}": v for k, v in out.items()}


def solve_stations(store: SurveyStore, config: SurveyConfig, freqs: np.ndarray, n_fft: int, *, client=None):
    """The global solve: arrays of a solution and a summary dict."""
    totals = load_totals(store)
    # The traces' noise-to-signal ratio per frequency, for the correction's prewhitening, from the
    # unsmoothed sums: smoothing over frequency lowers |cross| wherever the relative phase of a pair
    # turns with frequency (a relative static), which would read as noise.
    coherent = total = 0.0
    for p in (totals.receiver_pairs, totals.source_pairs):
        c, t = coherence_totals(p.cross, p.power_a, p.power_b)
        coherent, total = coherent + c, total + t
    nu = noise_to_signal(coherent, total)
    smoothing = config.estimate.smoothing_hz
    if smoothing > 0 and len(freqs) > 1:
        # Windows longer than the station filters give finer spectra than the filters need, and
        # each bin of a pair sum brings its own noise: smooth the sums over frequency (a lag window,
        # tasks.pairs.smooth_over_frequency). Measured with 2 Hz, median correlation of the
        # relative receiver filters with the truth: tiny 0.77 -> 0.84, demo 0.83 -> 0.89.
        df = float(freqs[1] - freqs[0])
        totals.receiver_pairs = smooth_pair_sums(totals.receiver_pairs, bin_hz=df, half_width_hz=smoothing)
        totals.source_pairs = smooth_pair_sums(totals.source_pairs, bin_hz=df, half_width_hz=smoothing)
    n_src = len(read_stations(store, "sources")["key"])
    n_rcv = len(read_stations(store, "receivers")["key"])
    lp = totals.log_power
    terms = ("source", "receiver", "offset") + (("cmp",) if config.estimate.cmp_bin_m > 0 else ())
    amp = amplitude_solve(lp, terms=terms)
    src_amp = np.zeros((n_src, len(freqs)))
    rcv_amp = np.zeros((n_rcv, len(freqs)))
    src_amp[: len(amp.source)] = amp.source
    rcv_amp[: len(amp.receiver)] = amp.receiver
    # The spectral shapes from the pair magnitudes, which noise does not bias the way it biases
    # log |D|^2; the log-power terms hold what the pairs leave open (pair_amplitude_solve notes).
    rp, sp = totals.receiver_pairs, totals.source_pairs
    rcv_amp = pair_amplitude_solve(rp.pairs, rp.cross, rp.count, prior=rcv_amp)
    src_amp = pair_amplitude_solve(sp.pairs, sp.cross, sp.count, prior=src_amp)
    method = config.estimate.phase_method
    warm = warm_start(store, freqs, {"receiver": n_rcv, "source": n_src}) if method == "eigen" else {}
    rph = _phases(client, totals.receiver_pairs, n_rcv, method, warm.get("receiver"))
    sph = _phases(client, totals.source_pairs, n_src, method, warm.get("source"))
    dt = store.sample_interval_s
    arrays = {"freq_hz": freqs, "amplitude_residual_rms": amp.residual_rms,
              "receiver_phase_residual": rph.residual, "source_phase_residual": sph.residual,
              "noise_to_signal": nu}
    arrays |= station_attributes("source", src_amp, sph, totals.source_pairs, n_src, freqs, config, dt, n_fft)
    arrays |= station_attributes("receiver", rcv_amp, rph, totals.receiver_pairs, n_rcv, freqs, config, dt, n_fft)
    summary = {
        "statistics": totals.keys,
        "warm_start": bool(warm),
        "receiver_components": int(rph.n_components), "source_components": int(sph.n_components),
        "receiver_identity": int(arrays["receiver_identity"].sum()),
        "source_identity": int(arrays["source_identity"].sum()),
        "amplitude_residual_rms": float(np.mean(amp.residual_rms)),
        "amplitude_method": amp.method, "amplitude_iterations": int(amp.iterations),
        "amplitude_converged": bool(np.all(amp.converged)),
        "receiver_phase_residual": float(np.mean(rph.residual)),
        "source_phase_residual": float(np.mean(sph.residual)),
        "noise_to_signal_median": float(np.nanmedian(nu)) if np.any(np.isfinite(nu)) else None,
    }
    return arrays, summary


def estimate_survey(store_path, config: SurveyConfig, *, client, progress=None) -> dict:
    """Statistics (resumable), the global solve, and a new current solution."""
    import time

    from descatter.flows.estimate import run_statistics, spectra_params
    from descatter.storage.estimation import list_solutions, solution_attrs, write_solution
    from descatter.flows.writer import store_writer

    t0 = time.perf_counter()
    with store_writer(store_path, "estimate") as (store, runlog):
        runlog.write("estimate", "start", swaths=store.swath_names())
        stats = run_statistics(store, config, client=client, runlog=runlog, progress=progress)
        n_fft = spectra_params(config, dt_s=store.sample_interval_s)["n_fft"]
        inputs = _inputs_fingerprint(stats.fingerprints, config)
        current = store.attrs.get("current_solution")
        if current and current in list_solutions(store) and solution_attrs(store, current).get("inputs") == inputs:
            # same statistics, same solve settings, same code: the current solution stands
            runlog.write("estimate", "end", solution=current, unchanged=True)
            a = solution_attrs(store, current)
            return {"solution": current, "summary": a["summary"], "warnings": a["warnings"],
                    "seconds": time.perf_counter() - t0, "spectra_resumed": stats.spectra_resumed,
                    "stats_skipped": stats.stats_skipped, "unchanged": True}
        if progress:
            progress("solve", 0, 1)
        arrays, summary = solve_stations(store, config, stats.freqs_hz, n_fft, client=client)
        if progress:
            progress("solve", 1, 1)
        warnings = []
        for kind in ("source", "receiver"):
            n_id = summary[f"{kind}_identity"]
            if n_id:
                warnings.append(f"{n_id} {kind} station(s) have fewer than {config.estimate.min_pairs} pairs "
                                "and get the identity filter")
            if summary[f"{kind}_components"] > 1:
                warnings.append(f"the {kind} graph falls into {summary[f'{kind}_components']} components, "
                                "each with its own gauge: statics may be offset between them")
        if not summary["amplitude_converged"]:
            warnings.append(f"the amplitude solve ({summary['amplitude_method']}) did not converge at "
                            "every frequency: station amplitudes there are the best iterate, not the solution")
        for b in stats.bridges:
            warnings.append(f"bridged {b['kind']} components {b.get('component_a')} and {b.get('component_b')} "
                            f"across {b.get('distance_m', 0):.1f} m")
        for w in warnings:
            log.warning(w)
            runlog.write("estimate", "warning", message=w)
        attrs = {
            "config": config.model_dump(mode="json"),
            "code_version": code_version(),
            "summary": summary,
            "components": stats.components,
            "bridges": [{k: (v.item() if hasattr(v, "item") else v) for k, v in b.items()} for b in stats.bridges],
            "warnings": warnings,
            "n_fft": n_fft,
            "dt_s": store.sample_interval_s,
            "inputs": inputs,
        }
        sid = write_solution(store, arrays, attrs)
        seconds = time.perf_counter() - t0
        runlog.write("estimate", "end", solution=sid, seconds=round(seconds, 3), **summary)
        return {"solution": sid, "summary": summary, "warnings": warnings, "seconds": seconds,
                "spectra_resumed": stats.spectra_resumed, "stats_skipped": stats.stats_skipped, "unchanged": False}


def _inputs_fingerprint(stats_fingerprints: dict, config: SurveyConfig) -> str:
    import hashlib
    import json

    doc = {"stats": stats_fingerprints, "estimate": config.estimate.model_dump(mode="json"),
           "analysis": config.analysis.model_dump(mode="json"), "code": code_version(),
           "solve": SOLVE_VERSION}
    return hashlib.blake2b(json.dumps(doc, sort_keys=True).encode(), digest_size=16).hexdigest()


def code_version() -> str:
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("descatter")
    except PackageNotFoundError:
        return "unknown"
