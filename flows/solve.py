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
import time
import uuid
from dataclasses import dataclass, field

import numpy as np

from descatter.flows.estimate import Timed, lps_from_arrays
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


@dataclass
class StatsKeys:
    """Which statistics a solve sums, in manifest order: per swath its own
    receiver pairs, its own source pairs, then the source pairs it shares
    with each earlier swath."""

    swaths: list[str]
    source: list[str]  # the swaths' own keys and the "a+b" keys
    all: list[str]


def stats_keys(store: SurveyStore) -> StatsKeys:
    names = store.swath_names()
    keys, source_keys = [], []
    for i, name in enumerate(names):
        keys.append(name)
        source_keys.append(name)
        for prev in names[:i]:
            key = f"{prev}+{name}"
            if has_stats(store.path, key, "source_pairs"):
                source_keys.append(key)
                keys.append(key)
    return StatsKeys(names, source_keys, keys)


def pair_total(store_path, group: str, keys: list[str], n_freq: int) -> PairSums:
    """The pair sums ``group`` of ``keys`` added in order, one part read at a
    time (only the pair tables of all parts are held together)."""
    tables = [read_stats(store_path, k, group, names=("pairs",))["pairs"] for k in keys]
    return PairSums.total(tables, lambda i: PairSums.from_arrays(read_stats(store_path, keys[i], group)), n_freq)


def log_power_total(store_path, names: list[str]) -> LogPowerSums:
    lp = None
    for name in names:
        part = lps_from_arrays(read_stats(store_path, name, "log_power"))
        lp = part if lp is None else lp + part
    return lp


def load_totals(store: SurveyStore) -> Totals:
    """Sum every swath's statistics (and swath pairs') in manifest order."""
    keys = stats_keys(store)
    lp = log_power_total(store.path, keys.swaths)
    n_freq = lp.sum_sq.shape[0]
    return Totals(pair_total(store.path, "receiver_pairs", keys.swaths, n_freq),
                  pair_total(store.path, "source_pairs", keys.source, n_freq), lp, keys.all)


def _phase_weight(p: PairSums) -> np.ndarray:
    """Coherence x shot count: pairs seen by many shots, coherently, count most."""
    return p.coherence() * p.count[:, None]


@dataclass
class PairTotal:
    """One pair kind's sums ready for the solve: smoothed over frequency, the
    phase-solve weight, and the unsmoothed coherence totals (noise level)."""

    sums: PairSums
    weight: np.ndarray
    coherent: np.ndarray
    total: np.ndarray


def prepared_pairs(store_path, group: str, keys: list[str], n_freq: int, bin_hz: float,
                   smoothing_hz: float) -> PairTotal:
    """Read and sum one pair kind, take its coherence totals, then smooth it."""
    p = pair_total(store_path, group, keys, n_freq)
    # The traces' noise-to-signal ratio per frequency, for the correction's prewhitening, comes
    # from the unsmoothed sums: smoothing over frequency lowers |cross| wherever the relative
    # phase of a pair turns with frequency (a relative static), which would read as noise.
    coherent, total = coherence_totals(p.cross, p.power_a, p.power_b)
    if smoothing_hz > 0 and n_freq > 1:
        # Windows longer than the station filters give finer spectra than the filters need, and
        # each bin of a pair sum brings its own noise: smooth the sums over frequency (a lag window,
        # tasks.pairs.smooth_over_frequency). Measured with 2 Hz, median correlation of the
        # relative receiver filters with the truth: tiny 0.77 -> 0.84, demo 0.83 -> 0.89.
        p = smooth_pair_sums(p, bin_hz=bin_hz, half_width_hz=smoothing_hz)
    return PairTotal(p, _phase_weight(p), coherent, total)


def phase_block(pt: PairTotal, n_stations: int, method: str, columns: slice, initial: np.ndarray | None):
    return phase_sync(pt.sums.pairs, pt.sums.cross, pt.weight, n_stations=n_stations, method=method,
                      columns=columns, initial=initial)


def pair_amplitude_term(kind: str, amp, pt: PairTotal, n: int, n_freq: int) -> np.ndarray:
    """One station kind's log-power terms from its pair magnitudes, with the
    log-power solution as the prior: float64 [n, n_freq]. Needs no phases, so
    it runs while the phase blocks do."""
    prior = np.zeros((n, n_freq))
    solved = amp.receiver if kind == "receiver" else amp.source
    prior[: len(solved)] = solved
    # The spectral shapes from the pair magnitudes, which noise does not bias the way it biases
    # log |D|^2; the log-power terms hold what the pairs leave open (pair_amplitude_solve notes).
    p = pt.sums
    return pair_amplitude_solve(p.pairs, p.cross, p.count, prior=prior)


def kind_solution(kind: str, amp_term: np.ndarray, pt: PairTotal, blocks: list, n: int, freqs: np.ndarray,
                  config: SurveyConfig, dt_s: float, n_fft: int) -> tuple[dict, dict]:
    """One station kind's response, filters and attributes from its
    amplitude terms (:func:`pair_amplitude_term`) and its frequency blocks
    of phases; and the phase summary."""
    phase = concat_phase_solutions(blocks)
    arrays = station_attributes(kind, amp_term, phase, pt.sums, n, freqs, config, dt_s, n_fft)
    arrays[f"{kind}_phase_residual"] = phase.residual
    return arrays, {"components": int(phase.n_components), "residual": float(np.mean(phase.residual))}


def amplitude_summary(amp) -> dict:
    """What the driver keeps of the amplitude solve."""
    return {"residual_rms": amp.residual_rms, "method": amp.method, "iterations": int(amp.iterations),
            "converged": bool(np.all(amp.converged))}


def noise_totals(pt: PairTotal) -> tuple[np.ndarray, np.ndarray]:
    return pt.coherent, pt.total


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


def _plain(x):
    if isinstance(x, Timed):
        return x.value
    if isinstance(x, list):
        return [_plain(v) for v in x]
    return x


def timed_call(fn, *args, **kwargs) -> Timed:
    """``fn`` on the values of any Timed arguments (also inside lists), timed."""
    t0 = time.perf_counter()
    value = fn(*(_plain(a) for a in args), **{k: _plain(v) for k, v in kwargs.items()})
    return Timed(value, time.perf_counter() - t0)


def _seconds(t: Timed) -> float:
    return t.seconds


def _amplitude_summary(t: Timed) -> dict:
    return amplitude_summary(t.value)


def _noise_totals(t: Timed) -> tuple[np.ndarray, np.ndarray]:
    return noise_totals(t.value)


def solve_stations(store: SurveyStore, config: SurveyConfig, freqs: np.ndarray, n_fft: int, *, client=None,
                   runlog=None):
    """The global solve: arrays of a solution and a summary dict.

    With a client it runs as a small graph of tasks on the workers (the sums
    of each pair kind and of the log power, the amplitude solve, blocks of
    frequencies of each phase solve, each kind's filters and attributes), so
    the driver holds no survey-sized array and both workers share the work;
    each task's seconds go to ``runlog`` as a ``solve`` batch record.
    Without a client the same functions run in this process.
    """
    keys = stats_keys(store)
    n_freq = len(freqs)
    bin_hz = float(freqs[1] - freqs[0]) if n_freq > 1 else 1.0
    est = config.estimate
    sizes = {"receiver": len(read_stations(store, "receivers")["key"]),
             "source": len(read_stations(store, "sources")["key"])}
    terms = ("source", "receiver", "offset") + (("cmp",) if est.cmp_bin_m > 0 else ())
    method = est.phase_method
    warm = warm_start(store, freqs, sizes) if method == "eigen" else {}
    dt = store.sample_interval_s
    path = str(store.path)
    blocks = [slice(a, min(a + FREQ_BLOCK, n_freq)) for a in range(0, n_freq, FREQ_BLOCK)]
    if client is None or len(blocks) == 1:
        blocks = [slice(None)]
    parts: list[tuple[str, object]] = []
    token = uuid.uuid4().hex[:8]
    addresses = sorted(client.scheduler_info(n_workers=-1)["workers"]) if client is not None else []

    def run(name, fn, *args, spread: int | None = None, **kwargs):
        """Submit one part (keys named by part, so Dask times each kind of part apart).
        ``spread=i`` asks for worker ``i`` modulo the workers, loosely: a worker
        that is gone or busy elsewhere does not hold the part back."""
        if client is None:
            out = timed_call(fn, *args, **kwargs)
        else:
            where = {} if spread is None or not addresses else \
                {"workers": [addresses[spread % len(addresses)]], "allow_other_workers": True}
            out = client.submit(timed_call, fn, *args, pure=False, key=f"solve-{name}-{len(parts)}-{token}",
                                **where, **kwargs)
        parts.append((name, out))
        return out

    def small(fn, x):
        """A small function of a part (its Timed), computed where the part is: a future, gathered
        with the others in one round trip (fetched one by one they cost about 0.1 s)."""
        return fn(x) if client is None else client.submit(fn, x, pure=False)

    lp = run("log_power", log_power_total, path, keys.swaths)
    amp = run("amplitude", amplitude_solve, lp, terms=terms)
    pairs = {kind: run(f"{kind}_pairs", prepared_pairs, path, f"{kind}_pairs", keys.swaths if kind == "receiver"
                       else keys.source, n_freq, bin_hz, est.smoothing_hz) for kind in ("receiver", "source")}
    # submitted before the phase blocks, so each starts as soon as its pair sums are made
    # (it had run inside the filters task, after every block: the receivers' 0.3 s at 502,400
    # traces, while the other worker waited)
    amp_terms = {kind: run(f"{kind}_amplitude", pair_amplitude_term, kind, amp, pairs[kind], sizes[kind], n_freq)
                 for kind in ("receiver", "source")}
    kinds = {}
    for kind in ("receiver", "source"):
        initial = warm.get(kind)
        if initial is not None and client is not None:
            initial = client.scatter(initial, hash=False)
        # Blocks go round the workers: left to itself the scheduler kept most of them where the
        # pair sums were made (110 MB at 502,400 traces), one worker idle for seconds.
        phases = [run(f"{kind}_phase", phase_block, pairs[kind], sizes[kind], method, b, initial, spread=i)
                  for i, b in enumerate(blocks)]
        kinds[kind] = run(f"{kind}_filters", kind_solution, kind, amp_terms[kind], pairs[kind], phases, sizes[kind],
                          freqs, config, dt, n_fft)
    wanted = {"kinds": kinds, "amplitude": small(_amplitude_summary, amp),
              "noise": {k: small(_noise_totals, v) for k, v in pairs.items()},
              "seconds": [small(_seconds, f) for _, f in parts] if runlog is not None else []}
    got = wanted if client is None else client.gather(wanted)
    results = {k: t.value for k, t in got["kinds"].items()}
    amp_v, noise = got["amplitude"], got["noise"]
    for (name, _), sec in zip(parts, got["seconds"]):
        runlog.write("solve", "batch", part=name, seconds=round(float(sec), 4))
    nu = noise_to_signal(noise["receiver"][0] + noise["source"][0], noise["receiver"][1] + noise["source"][1])
    arrays = {"freq_hz": freqs, "amplitude_residual_rms": amp_v["residual_rms"], "noise_to_signal": nu}
    arrays |= results["source"][0]
    arrays |= results["receiver"][0]
    rph, sph = results["receiver"][1], results["source"][1]
    summary = {
        "statistics": keys.all,
        "warm_start": bool(warm),
        "receiver_components": rph["components"], "source_components": sph["components"],
        "receiver_identity": int(arrays["receiver_identity"].sum()),
        "source_identity": int(arrays["source_identity"].sum()),
        "amplitude_residual_rms": float(np.mean(amp_v["residual_rms"])),
        "amplitude_method": amp_v["method"], "amplitude_iterations": amp_v["iterations"],
        "amplitude_converged": amp_v["converged"],
        "receiver_phase_residual": rph["residual"],
        "source_phase_residual": sph["residual"],
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
        arrays, summary = solve_stations(store, config, stats.freqs_hz, n_fft, client=client, runlog=runlog)
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
