"""The ``descatter`` command line.

Heavy modules (Dask, zarr, Prefect) are imported inside the commands that
need them, so read-only commands start fast and never start Prefect.
"""

from __future__ import annotations

import logging
import os
import sys
from pathlib import Path
from typing import Annotated, List, Optional, Tuple

import typer
from rich.console import Console

from descatter.tasks.errors import DescatterError

app = typer.Typer(
    add_completion=False,
    pretty_exceptions_show_locals=False,
    no_args_is_help=True,
    help=(
        "Measure and remove near-surface scattering in 3D land seismic surveys. "
        "Results must be reviewed by a qualified geophysicist before they are used."
    ),
)
config_app = typer.Typer(no_args_is_help=True, help="Write or check a survey config file.")
app.add_typer(config_app, name="config")

console = Console(stderr=False)
err_console = Console(stderr=True)


def _progress(description: str):
    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn

    return Progress(
        TextColumn("[bold]{task.description}"), BarColumn(), MofNCompleteColumn(),
        TextColumn("traces"), TimeRemainingColumn(), console=err_console, transient=False,
        disable=not err_console.is_terminal,
    )


class ConsoleLogHandler(logging.Handler):
    """Log lines through the error console: while progress bars are drawn
    there, rich prints each line above them (a plain stream handler writes
    into the bars). A DescatterError is bad input, not a bug: the command
    ends with its message, so the flow's log lines about it go without
    the traceback. (A public name: Prefect keeps a root handler it takes
    for the user's, and replaces one whose class name starts with '_'.)"""

    def emit(self, record: logging.LogRecord) -> None:
        try:
            if record.exc_info and isinstance(record.exc_info[1], DescatterError):
                record = logging.makeLogRecord({**record.__dict__, "exc_info": None, "exc_text": None})
            err_console.print(self.format(record), markup=False, highlight=False, soft_wrap=True)
        except Exception:
            self.handleError(record)


CLUSTER_HELP = ("local, threads, tcp://HOST:PORT, or a cluster profile: a name in deploy/clusters "
                "(slurm, pbs, kubernetes, scheduler) or a path to a .toml")

# Parameters shared by several commands, declared once. Typer takes the
# default from the parameter (``cluster: ClusterOpt = "local"``), not from here.
StoreArg = Annotated[Path, typer.Argument(help="survey store")]
ClusterOpt = Annotated[str, typer.Option("--cluster", help=CLUSTER_HELP)]
WorkersOpt = Annotated[Optional[int], typer.Option(
    "--workers", help="worker processes (local default: one per core; batch and Kubernetes profiles: workers to ask for)")]
MemoryLimitOpt = Annotated[Optional[str], typer.Option(
    "--memory-limit", help="per worker, e.g. 4GB (local clusters only; profiles set their own)")]
StoredConfigOpt = Annotated[Optional[Path], typer.Option(
    "--config", help="survey config (default: the one kept at ingest)")]
NewStoreConfigOpt = Annotated[Optional[Path], typer.Option(
    "--config", help="survey config (TOML); default: the one kept in the store, or the defaults for a new store")]
SolutionOpt = Annotated[Optional[str], typer.Option("--solution", help="solution id (default: the current one)")]


def _kept(recomputed: int, traces: int) -> str:
    if recomputed >= traces:
        return ""
    return (f"; {traces - recomputed} kept their correction (their filters moved less than "
            "correction.reapply_tolerance, or the chunk was already done)")


def _opt_path(path: Optional[Path]) -> Optional[str]:
    """A flow parameter: Prefect records parameters as JSON, so paths go as text."""
    return None if path is None else str(path)


# -- config ---------------------------------------------------------------

@config_app.command("init")
def config_init(
    path: Path = typer.Argument(..., help="where to write the template (TOML)"),
    force: bool = typer.Option(False, "--force", help="overwrite an existing file"),
) -> None:
    """Write a commented template: every key, its default and its unit."""
    from descatter.storage.atomic import write_bytes_atomic
    from descatter.storage.config_file import config_template

    if path.exists() and not force:
        raise DescatterError(f"{path}: exists; pass --force to overwrite it")
    write_bytes_atomic(path, config_template().encode())
    console.print(f"wrote {path}")


@config_app.command("check")
def config_check(
    path: Path = typer.Argument(..., help="survey config (TOML)"),
    store: Optional[Path] = typer.Option(None, "--store", help="also check against this store's sampling"),
) -> None:
    """Validate a config and print the effective config."""
    from descatter.storage.config_file import dump_config, load_config

    cfg = load_config(path)
    if store is not None:
        from descatter.storage.store import SurveyStore

        s = SurveyStore.open(store)
        n = s.n_samples
        dt = s.sample_interval_s
        if n and dt and cfg.analysis.window_end_s > (n - 1) * dt:
            raise DescatterError(
                f"{path}: analysis.window_end_s = {cfg.analysis.window_end_s} s is past the end "
                f"of the traces in {store} ({(n - 1) * dt:g} s)"
            )
    console.print(f"# {path}: valid. Effective config:")
    console.print(dump_config(cfg), markup=False, highlight=False)


# -- synth ----------------------------------------------------------------

@app.command()
def synth(
    out: Path = typer.Argument(..., help="folder for lineNN.sgy, survey.toml and truth.npz"),
    scenario: str = typer.Option("scatter", help="scatter (codas, statics, amplitudes) or statics (no coda)"),
    swaths: Optional[int] = typer.Option(None, help="number of source lines, one SEG-Y file each"),
    size: str = typer.Option("tiny", help="tiny, demo or large"),
    traces: Optional[int] = typer.Option(None, help="about this many traces in all (overrides --size)"),
    seed: int = typer.Option(0, help="random seed; the survey is deterministic from it"),
    sps: bool = typer.Option(False, "--sps", help="also write SEG SPS geometry: survey.s, survey.r, survey.x"),
) -> None:
    """Write a synthetic land survey with known truth."""
    from descatter.flows.synth import write_synthetic_survey

    with _progress("synth") as bar:
        task = bar.add_task("synth", total=None)
        report = write_synthetic_survey(
            out, scenario=scenario, n_swaths=swaths, size=None if traces else size, n_traces=traces,
            seed=seed, sps=sps, progress=lambda done, total: bar.update(task, completed=done, total=total))
    console.print(f"wrote {len(report.files)} swath file(s), {report.traces} traces, to {out}")
    console.print(f"  config: {report.config}\n  truth:  {report.truth}")
    if report.sps:
        console.print("  sps:    " + " ".join(str(p) for p in report.sps))


# -- ingest ---------------------------------------------------------------

@app.command()
def ingest(
    store: Path = typer.Argument(..., help="survey store (created if missing)"),
    files: List[Path] = typer.Argument(..., help="SEG-Y files, one swath each (named by file stem)"),
    config: NewStoreConfigOpt = None,
    workers: WorkersOpt = None,
    cluster: ClusterOpt = "local",
    memory_limit: MemoryLimitOpt = None,
) -> None:
    """Add SEG-Y swaths to a survey store (a committed file is skipped).

    Runs as the Prefect flow descatter-ingest.
    """
    from descatter.storage.config_file import load_config

    load_config(config)  # a bad config fails here, before Prefect and the cluster start
    from descatter.flows.service import ingest_flow, local_run

    with _progress("ingest") as bar, local_run():
        tasks: dict[str, int] = {}

        def progress(swath: str, done: int, total: int) -> None:
            if swath not in tasks:
                tasks[swath] = bar.add_task(swath, total=total)
            bar.update(tasks[swath], completed=done)

        report = ingest_flow(str(store), [str(f) for f in files], _opt_path(config), cluster=cluster,
                             workers=workers, memory_limit=memory_limit, progress=progress)
    for name in report["skipped"]:
        console.print(f"skipped {name}: already in the store")
    if report["added"]:
        mb = report["bytes_read"] / 1e6
        console.print(
            f"added {len(report['added'])} swath(s) ({', '.join(report['added'])}), {report['traces']} traces, "
            f"{mb:.1f} MB in {report['seconds']:.1f} s"
            + (f"; resumed {report['resumed_chunks']} finished chunk(s)" if report["resumed_chunks"] else "")
        )


# -- estimate -------------------------------------------------------------

@app.command()
def estimate(
    store: StoreArg,
    config: StoredConfigOpt = None,
    workers: WorkersOpt = None,
    cluster: ClusterOpt = "local",
    memory_limit: MemoryLimitOpt = None,
) -> None:
    """Measure every station's near-surface filter: spectra, pair statistics, global solve.

    Runs as the Prefect flow descatter-estimate.
    """
    from descatter.storage.config_file import config_for_store

    config_for_store(store, config)  # a bad store or config fails here, before Prefect and the cluster start
    from descatter.flows.service import estimate_flow, local_run

    with _progress("estimate") as bar, local_run():
        tasks: dict[str, int] = {}

        def progress(stage: str, done: int, total: int) -> None:
            if stage not in tasks:
                tasks[stage] = bar.add_task(stage, total=total)
            bar.update(tasks[stage], completed=done, total=total)

        result = estimate_flow(str(store), _opt_path(config), cluster=cluster, workers=workers,
                               memory_limit=memory_limit, progress=progress)
    s = result["summary"]
    console.print(f"solution {result['solution']} in {result['seconds']:.1f} s: "
                  f"{s['source_components']} source and {s['receiver_components']} receiver component(s); "
                  f"amplitude residual {s['amplitude_residual_rms']:.3f} (log power, rms)")
    for w in result["warnings"]:
        console.print(f"[yellow]warning:[/] {w}", highlight=False)


@app.command()
def apply(
    store: StoreArg,
    mode: Optional[str] = typer.Option(None, "--mode", help="full (amplitude and phase, default) or phase"),
    solution: SolutionOpt = None,
    config: StoredConfigOpt = None,
    prewhitening: Optional[float] = typer.Option(None, "--prewhitening", help="fraction of mean in-band power"),
    workers: WorkersOpt = None,
    cluster: ClusterOpt = "local",
    memory_limit: MemoryLimitOpt = None,
) -> None:
    """Apply a solution's correction filters to every trace (into each swath's 'corrected').

    Runs as the Prefect flow descatter-apply.
    """
    from descatter.flows.service import apply_flow, correction_config, local_run

    # a bad store, config or option fails here, before the flow and the cluster start
    correction_config(store, config, mode=mode, prewhitening=prewhitening)
    with _progress("apply") as bar, local_run():
        task = bar.add_task("apply", total=None)
        result = apply_flow(str(store), _opt_path(config), solution=solution, cluster=cluster, workers=workers,
                            memory_limit=memory_limit, mode=mode, prewhitening=prewhitening,
                            progress=lambda stage, done, total: bar.update(task, completed=done, total=total))
    console.print(f"corrected {result['recomputed']} of {result['traces']} traces with solution "
                  f"{result['solution']} ({result['settings']['mode']}, {result['settings']['prewhitening_mode']} "
                  f"prewhitening {result['settings']['prewhitening']:g}) in {result['seconds']:.1f} s; "
                  f"{result['passed_through']} passed through unchanged"
                  f"{_kept(result['recomputed'], result['traces'])}")


@app.command()
def report(
    store: Path = typer.Argument(..., help="survey store (estimated and corrected)"),
    out: Path = typer.Argument(..., help="folder for index.html, PNG figures and metrics.json"),
    solution: SolutionOpt = None,
    max_traces: int = typer.Option(200_000, "--max-traces", help="traces sampled (whole shots) for trace metrics"),
) -> None:
    """QC report: station maps, pair correlations, gathers, spectra, S/N before and after, spacing."""
    from descatter.flows.report import write_report

    r = write_report(store, out, solution=solution, max_traces=max_traces)
    console.print(f"wrote {r['index']} ({len(r['figures'])} figures) and {r['metrics']}")


@app.command()
def solutions(store: StoreArg) -> None:
    """List the store's solutions (the current one marked)."""
    from descatter.storage.estimation import list_solutions, solution_attrs
    from descatter.storage.store import SurveyStore

    s = SurveyStore.open(store)
    current = s.attrs.get("current_solution")
    ids = list_solutions(s)
    if not ids:
        console.print(f"{store}: no solution yet (run 'descatter estimate')")
    for sid in ids:
        a = solution_attrs(s, sid)
        an, es = a["config"]["analysis"], a["config"]["estimate"]
        console.print(
            f"{'*' if sid == current else ' '} {sid}  {a['created']}  band {an['band_hz'][0]:g}-{an['band_hz'][1]:g} Hz, "
            f"window {an['window_start_s']:g}-{an['window_end_s']:g} s, radii {es['receiver_radius_m']:g}/"
            f"{es['source_radius_m']:g} m, {len(a['summary']['statistics'])} statistics keys", highlight=False)


@app.command()
def stations(
    store: StoreArg,
    out: Path = typer.Argument(..., help="stations.csv (or filters.npz with --filters)"),
    filters: bool = typer.Option(False, "--filters", help="write station responses and filters (.npz)"),
    solution: SolutionOpt = None,
) -> None:
    """Write a solution's stations (attributes as CSV, or filters as .npz)."""
    from descatter.flows.stations_table import write_filters, write_station_table

    sid, n = (write_filters if filters else write_station_table)(store, out, solution=solution)
    console.print(f"wrote {n} station(s) of solution {sid} to {out}")


# -- info -----------------------------------------------------------------

@app.command()
def info(store: StoreArg) -> None:
    """Traces, samples, interval, swaths and warnings of a store."""
    from descatter.flows.summary import store_summary

    console.print(store_summary(store), highlight=False, soft_wrap=True)


# -- geometry -------------------------------------------------------------

@app.command()
def geometry(
    store: StoreArg,
    sps: Tuple[Path, Path, Path] = typer.Option(..., "--sps", help="SEG SPS files: S (sources), R (receivers), X (relations)"),
    config: Optional[Path] = typer.Option(None, "--config", help="survey config (SPS revision, columns, snapping)"),
) -> None:
    """Rebuild the store's geometry from SEG SPS files; report header disagreements."""
    from descatter.flows.sps_geometry import apply_sps_geometry
    from descatter.storage.config_file import load_config

    report = apply_sps_geometry(store, list(sps), load_config(config))
    console.print(f"geometry of {report.traces} traces rebuilt from {', '.join(map(str, sps))}")
    console.print(f"{report.n_disagreeing} trace(s) where SPS and header positions disagree beyond tolerance")
    for r in report.disagreements:
        console.print(f"  {r['swath']} trace {r['trace']}: {r['error_m']:.2f} m (source line {r['source_line']:g} "
                      f"point {r['source_point']:g}, receiver line {r['receiver_line']:g} point {r['receiver_point']:g})")


# -- qc -------------------------------------------------------------------

@app.command()
def qc(
    store: StoreArg,
    out: Path = typer.Argument(..., help="CSV file: swath,trace,field_record,channel,flags"),
) -> None:
    """Write every flagged or excluded trace with its reasons to a CSV file."""
    from descatter.flows.qc import write_qc_report

    n = write_qc_report(store, out)
    console.print(f"wrote {n} flagged trace(s) to {out}")


# -- export ---------------------------------------------------------------

@app.command()
def export(
    store: StoreArg,
    out: Path = typer.Argument(..., help="output SEG-Y file (or folder with --per-swath)"),
    array: str = typer.Option("traces", "--array", help="traces or corrected"),
    sample_format: str = typer.Option("ieee", "--format", help="ieee (format 5) or ibm (format 1)"),
    byte_order: str = typer.Option("big", "--byte-order", help="big (standard) or little"),
    per_swath: bool = typer.Option(False, "--per-swath", help="one file per swath: OUT/<swath>.sgy"),
) -> None:
    """Write the store's traces back to SEG-Y."""
    from descatter.flows.export import export_segy

    if sample_format not in ("ieee", "ibm"):
        raise DescatterError(f"--format {sample_format!r}: expected 'ieee' or 'ibm'")
    if byte_order not in ("big", "little"):
        raise DescatterError(f"--byte-order {byte_order!r}: expected 'big' or 'little'")
    with _progress("export") as bar:
        task = bar.add_task("export", total=None)
        report = export_segy(store, out, array=array, sample_format=sample_format, byte_order=byte_order,
                             per_swath=per_swath,
                             progress=lambda done, total: bar.update(task, completed=done, total=total))
    console.print(f"wrote {report.traces} traces to " + ", ".join(str(f) for f in report.files))


# -- run and status ---------------------------------------------------------

@app.command()
def run(
    store: Path = typer.Argument(..., help="survey store (created if missing)"),
    files: List[Path] = typer.Argument(..., help="SEG-Y files, one swath each"),
    config: NewStoreConfigOpt = None,
    cluster: ClusterOpt = "local",
    workers: WorkersOpt = None,
    memory_limit: MemoryLimitOpt = None,
) -> None:
    """ingest -> estimate -> apply as one Prefect flow on a Dask cluster.

    Files already in the store are skipped, so a run with a new swath does only
    its work, solves again and re-applies where station filters changed.
    """
    from descatter.flows.service import local_run, run_flow

    with local_run():
        out = run_flow(str(store), [str(f) for f in files], _opt_path(config), cluster=cluster,
                       workers=workers, memory_limit=memory_limit)
    console.print(f"ingest: added {out['ingest']['added']}, skipped {out['ingest']['skipped']}; "
                  f"solution {out['estimate']['solution']}; corrected {out['apply']['recomputed']} of "
                  f"{out['apply']['traces']} traces{_kept(out['apply']['recomputed'], out['apply']['traces'])}")


@app.command()
def swath(
    store: StoreArg,
    action: str = typer.Argument(..., help="remove or replace"),
    name: str = typer.Argument(..., help="the swath (a file stem, e.g. line03)"),
    file: Optional[Path] = typer.Argument(None, help="replace: the new SEG-Y file, named NAME.sgy"),
    config: StoredConfigOpt = None,
    cluster: ClusterOpt = "local",
    workers: WorkersOpt = None,
    memory_limit: MemoryLimitOpt = None,
) -> None:
    """Remove a swath, or replace it by a new file; then solve again and re-apply where filters changed.

    The store keeps nothing of a removed swath but its run-log records.
    Runs as the Prefect flow descatter-swath.
    """
    if action not in ("remove", "replace"):
        raise DescatterError(f"swath action {action!r}: expected 'remove' or 'replace'")
    if action == "replace" and file is None:
        raise DescatterError(f"swath replace {name}: give the new SEG-Y file ({name}.sgy)")
    if action == "remove" and file is not None:
        raise DescatterError(f"swath remove {name} takes no file (did you mean 'replace'?)")
    from descatter.storage.store import SurveyStore

    SurveyStore.open(store)  # a bad store fails here, before Prefect starts
    from descatter.flows.service import local_run, swath_flow

    with local_run():
        out = swath_flow(str(store), action, name, _opt_path(file), _opt_path(config), cluster=cluster,
                         workers=workers, memory_limit=memory_limit)
    r = out["removed"]
    what = f"removed {name} ({r['traces']} traces, {len(r['stats_keys'])} statistics keys)" if r["was_committed"] \
        else f"removed the leftovers of {name}"
    if out["added"]:
        what += f"; added {', '.join(out['added'])}"
    if out["solution"]:
        what += (f"; solution {out['solution']}; corrected {out['recomputed']} of {out['traces']} traces"
                 f"{_kept(out['recomputed'], out['traces'])}")
    else:
        what += "; no swath left"
    console.print(what)


@app.command()
def status(store: StoreArg) -> None:
    """Per stage: chunks done/total, throughput, ETA, last warnings and errors (from the run log)."""
    from descatter.flows.status import status_text

    console.print(status_text(store), highlight=False, soft_wrap=True)


# -- lock -----------------------------------------------------------------

@app.command()
def lock(
    store: StoreArg,
    clear: bool = typer.Option(False, "--clear", help="remove a stale lock (refused while its holder lives)"),
) -> None:
    """Show the store's writer lock, or clear a stale one."""
    from descatter.storage.lock import clear_lock, describe_holder, lock_is_stale, read_lock

    holder = read_lock(store)
    if holder is None:
        console.print(f"{store}: not locked")
        return
    if clear:
        clear_lock(store)
        console.print(f"{store}: cleared the lock of {describe_holder(holder)}")
        return
    why = lock_is_stale(holder)
    console.print(f"{store}: locked by {describe_holder(holder)}" + (f" - stale: {why}" if why else ""))


# -- demo -----------------------------------------------------------------

@app.command()
def demo(
    out: Path = typer.Argument(Path("demo-run"), help="folder for the demo survey, store and outputs"),
    size: str = typer.Option("demo", help="tiny or demo"),
    cluster: ClusterOpt = "local",
    workers: WorkersOpt = None,
    memory_limit: MemoryLimitOpt = None,
) -> None:
    """Run every stage on a synthetic survey and say where to look.

    Ingest, estimate and apply run as their Prefect flows, on one Dask cluster.
    """
    from descatter.flows.demo import run_demo

    run_demo(out, size=size, cluster=cluster, workers=workers, memory_limit=memory_limit, console=console,
             progress=_progress)


def main() -> None:
    logging.basicConfig(level=logging.WARNING, format="%(levelname)s %(name)s: %(message)s",
                        handlers=[ConsoleLogHandler()])
    # distributed configures its loggers when first imported (lazily, later)
    os.environ.setdefault("DASK_LOGGING__DISTRIBUTED", "error")
    os.environ.setdefault("DASK_DISTRIBUTED__LOGGING__DISTRIBUTED", "error")
    try:
        app(standalone_mode=True)
    except DescatterError as exc:
        err_console.print(f"[bold red]error:[/] {exc}", highlight=False)
        sys.exit(2)


if __name__ == "__main__":
    main()
