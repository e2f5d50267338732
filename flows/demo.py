"""``descatter demo``: every stage that exists, on a synthetic survey.

synth -> DIR/survey, ingest -> DIR/store.zarr, estimate (station filters,
DIR/stations.csv), apply, info, export -> DIR/export.sgy (input traces,
checked against the store with segyio as an independent reader) and
DIR/corrected.sgy, report -> DIR/report/index.html.
"""

from __future__ import annotations

import time
from pathlib import Path

from descatter.flows.cluster import dask_client
from descatter.flows.apply import apply_solution
from descatter.flows.export import export_segy
from descatter.flows.report import write_report
from descatter.flows.ingest import ingest_swaths
from descatter.flows.solve import estimate_survey
from descatter.flows.stations_table import write_station_table
from descatter.flows.summary import store_summary
from descatter.flows.synth import write_synthetic_survey
from descatter.storage.config_file import load_config
from descatter.storage.segy_check import compare_with_store
from descatter.tasks.errors import DescatterError


def run_demo(out: str | Path, *, size: str = "demo", workers: int | None = None, console, progress) -> dict:
    out = Path(out)
    survey_dir, store, exported = out / "survey", out / "store.zarr", out / "export.sgy"
    stations = out / "stations.csv"
    corrected, report_dir = out / "corrected.sgy", out / "report"
    t0 = time.perf_counter()
    console.print(f"[bold]1/6 synth[/] a {size} scattering survey into {survey_dir}")
    synth = write_synthetic_survey(survey_dir, scenario="scatter", size=size, seed=7)
    console.print(f"    {len(synth.files)} swath files, {synth.traces} traces")

    console.print(f"[bold]2/6 ingest[/] into {store}")
    cfg = load_config(synth.config)
    with progress("ingest") as bar, dask_client("local", workers=workers) as client:
        tasks: dict[str, int] = {}

        def on_progress(swath: str, done: int, total: int) -> None:
            if swath not in tasks:
                tasks[swath] = bar.add_task(swath, total=total)
            bar.update(tasks[swath], completed=done)

        report = ingest_swaths(store, synth.files, cfg, client=client, progress=on_progress)
        console.print(f"    added {len(report.added)}, already there {len(report.skipped)}")
        console.print("[bold]3/6 estimate[/] station filters from pair statistics over all shots")
        est = estimate_survey(store, cfg, client=client,
                              progress=lambda stage, done, total: on_progress(stage, done, total))
        console.print("[bold]4/6 apply[/] correction filters to every trace")
        applied = apply_solution(store, cfg, client=client,
                                 progress=lambda stage, done, total: on_progress(stage, done, total))
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
