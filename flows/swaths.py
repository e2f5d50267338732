"""Removing and replacing a swath, then bringing the solution and the
corrected traces up to date.

``remove``: the swath leaves the manifest and the store keeps nothing of it
(storage.swath_removal); the global solve reruns from the remaining
statistics (nothing else is recomputed) and the correction is re-applied
where station filters changed. ``replace`` is remove + ingest of the new
file + solve + apply under one hold of the store's lock, so no other writer
sees the survey without the swath. The new file is scanned before anything
is removed; a file refused later by trace QC (policy ``error``) leaves the
survey without the swath, and the error says so.
"""

from __future__ import annotations

import time
from dataclasses import asdict
from pathlib import Path

from descatter.flows.apply import apply_solution
from descatter.flows.ingest import ingest_swaths
from descatter.flows.solve import estimate_survey
from descatter.storage.lock import StoreLock
from descatter.storage.runlog import RunLog
from descatter.storage.segy import scan_segy
from descatter.storage.store import SurveyStore
from descatter.storage.swath_removal import remove_swath
from descatter.tasks.config import SurveyConfig
from descatter.tasks.errors import ConfigError, DescatterError, InputNotFoundError

STAGE = "swath"


def _update(store_path: Path, config: SurveyConfig, client, progress) -> dict:
    """Solve and apply again, if any swath is left."""
    store = SurveyStore.open(store_path, writable=True)
    if not store.swath_names():
        store.set_attrs(current_solution=None)
        return {"estimate": None, "apply": None}
    est = estimate_survey(store_path, config, client=client, progress=progress)
    app = apply_solution(store_path, config, client=client, progress=progress)
    return {"estimate": est, "apply": app}


def remove_swath_and_update(store_path: str | Path, name: str, config: SurveyConfig, *, client,
                            progress=None) -> dict:
    """Remove swath ``name``, re-solve and re-apply; returns what each step did."""
    store_path = Path(store_path)
    t0 = time.perf_counter()
    with StoreLock(store_path, command=f"swath remove {name}"):
        store = SurveyStore.open(store_path, writable=True)
        runlog = RunLog(store_path)
        runlog.write(STAGE, "start", action="remove", swath=name)
        removal = remove_swath(store, name)
        runlog.write(STAGE, "removed", **asdict(removal))
        out = {"removed": asdict(removal), **_update(store_path, config, client, progress)}
        runlog.write(STAGE, "end", action="remove", swath=name, seconds=round(time.perf_counter() - t0, 3))
        return out


def replace_swath_and_update(store_path: str | Path, name: str, file: str | Path, config: SurveyConfig, *,
                             client, progress=None) -> dict:
    """Replace swath ``name`` by the SEG-Y ``file`` (whose stem must be the
    name), re-solve and re-apply, all under one hold of the lock."""
    store_path, file = Path(store_path), Path(file)
    if file.stem != name:
        raise ConfigError(f"{file}: a swath is named by its file's stem, so {name!r} can only be replaced by a "
                          f"file named {name}{file.suffix or '.sgy'}")
    if not file.is_file():
        raise InputNotFoundError(f"{file}: no such SEG-Y file")
    t0 = time.perf_counter()
    with StoreLock(store_path, command=f"swath replace {name}"):
        store = SurveyStore.open(store_path, writable=True)
        runlog = RunLog(store_path)
        runlog.write(STAGE, "start", action="replace", swath=name, file=str(file))
        # a truncated or foreign file is refused before anything is removed
        scan_segy(file, config.ingest.headers.layout())
        removal = remove_swath(store, name)
        runlog.write(STAGE, "removed", **asdict(removal))
        try:
            ingest = ingest_swaths(store_path, [file], config, client=client, runlog=runlog)
        except DescatterError as exc:
            runlog.write(STAGE, "error", action="replace", swath=name, error=str(exc))
            raise type(exc)(f"swath {name} was removed but its replacement was refused: {exc} "
                            f"(fix the file, then 'descatter ingest {store_path} {file}')") from exc
        out = {"removed": asdict(removal), "ingest": ingest, **_update(store_path, config, client, progress)}
        runlog.write(STAGE, "end", action="replace", swath=name, seconds=round(time.perf_counter() - t0, 3))
        return out
