"""``descatter demo``: every stage that exists, on a synthetic survey.

synth -> DIR/survey, ingest -> DIR/store.zarr, estimate (station filters,
DIR/stations.csv), apply, info, export -> DIR/export.sgy (input traces,
checked against the store with segyio as an independent reader) and
DIR/corrected.sgy, report -> DIR/report/index.html. Ingest, estimate and
apply are the service's Prefect flows, as in the single-stage commands.
"""

from __future__ import annotations

import contextlib
import time
from pathlib import Path
from typing import Iterator

from descatter.flows.cluster import dask_client
from descatter.flows.export import export_segy
from descatter.flows.report import write_report
from descatter.flows.service import apply_flow, estimate_flow, ingest_flow, local_run
from descatter.flows.stations_table import write_station_table
from descatter.flows.summary import store_summary
from descatter.flows.synth import write_synthetic_survey
from descatter.storage.segy_check import compare_with_store
from descatter.tasks.errors import DescatterError


@contextlib.contextmanager
def shared_cluster(cluster: str, *, workers: int | None = None, memory_limit: str | None = None) -> Iterator[str]:
    """A cluster the demo's three flows share: for ``local``, one local
    cluster whose scheduler address each flow connects to (instead of each
    starting its own worker processes); other values pass through."""
    if cluster != "local":
        yield cluster
        return
    with dask_client("local", workers=workers, memory_limit=memory_limit) as client:
        yield client.scheduler.address


def run_demo(out: str | Path, *, size: str = "demo", cluster: str = "local", workers: int | None = None,
             memory_limit: str | None = None, console, progress) -> dict:
    out = Path(out)
    survey_dir, store, exported = out / "survey", out / "store.zarr", out / "export.sgy"
    stations = out / "stations.csv"
    corrected, report_dir = out / "corrected.sgy", out / "report"
    t0 = time.perf_counter()
    console.print(f"[bold]1/6 synth[/] a {size} scattering survey into {survey_dir}")
    synth = write_synthetic_survey(survey_dir, scenario="scatter", size=size, seed=7)
    console.print(f"    {len(synth.files)} swath files, {synth.traces} traces")

    console.print(f"[bold]2/6 ingest[/] into {store}")
    config = str(synth.config)
    with progress("ingest") as bar, shared_cluster(cluster, workers=workers, memory_limit=memory_limit) as address, \
            local_run():
        tasks: dict[str, int] = {}

        def on_progress(part: str, done: int, total: int) -> None:
            if part not in tasks:
                tasks[part] = bar.add_task(part, total=total)
            bar.update(tasks[part], completed=done, total=total)

        run = dict(cluster=address, workers=workers, memory_limit=memory_limit, progress=on_progress)
        report = ingest_flow(str(store), [str(f) for f in synth.files], config, **run)
        console.print(f"    added {len(report['added'])}, already there {len(report['skipped'])}")
        console.print("[bold]3/6 estimate[/] station filters from pair statistics over all shots")
        est = estimate_flow(str(store), config, **run)
        console.print("[bold]4/6 apply[/] correction filters to every trace")
        applied = apply_flow(str(store), config, **run)
        console.print(f"    corrected {applied['traces']} traces")
    write_station_table(store, stations)
    s = est["summary"]
    console.print(f"    solution {est['solution']}: {s['source_components']} source and "
                  f"{s['receiver_components']} receiver component(s); station table {stations}")

    console.print("[bold]5/6 info[/]")
    console.print(store_summary(store), highlight=False, soft_wrap=True)

    console.print(f"[bold]6/6 export and report[/] {exported} (checked with segyio), {corrected}, {report_dir}")
    export_segy(store, exported)
    mismatches = compare_with_store(exported, store)
    if mismatches:
        raise DescatterError(f"demo: the exported file differs from the store: {mismatches}")
    console.print("    round trip: every sample and trace header equal")
    export_segy(store, corrected, array="corrected")
    rep = write_report(store, report_dir)
    console.print(f"    mean semblance of NMO-corrected shot gathers: {rep['mean_semblance_before']:.3f} before, "
                  f"{rep['mean_semblance_after']:.3f} after; in the high-scattering zone "
                  f"{rep['high_zone_semblance_before']:.3f} before, {rep['high_zone_semblance_after']:.3f} after")
    if rep.get("truth_median_correlation_after") is not None:
        console.print(f"    median zero-lag correlation with the clean truth (synthetic, no station filters, no noise): "
                      f"{rep['truth_median_correlation_before']:.3f} before, "
                      f"{rep['truth_median_correlation_after']:.3f} after")
    seconds = time.perf_counter() - t0
    console.print(
        f"\n[bold]done[/] in {seconds:.0f} s. Look at:\n"
        f"  survey and truth   {survey_dir}\n"
        f"  survey store       {store}   (descatter info {store})\n"
        f"  station table      {stations}\n"
        f"  exported SEG-Y     {exported}\n"
        f"  corrected SEG-Y    {corrected}\n"
        f"  QC report          {report_dir / 'index.html'}\n"
        "Results must be reviewed by a qualified geophysicist before they are used."
    )
    return {"survey": survey_dir, "store": store, "export": exported, "stations": stations, "corrected": corrected,
            "report": report_dir / "index.html", "seconds": seconds}
