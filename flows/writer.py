"""The single writer of a stage that works on committed swaths."""

from __future__ import annotations

import contextlib
from pathlib import Path
from typing import Iterator

from descatter.storage.atomic import sweep_partials
from descatter.storage.lock import StoreLock
from descatter.storage.runlog import RunLog
from descatter.storage.store import SurveyStore
from descatter.tasks.errors import InputNotFoundError


@contextlib.contextmanager
def store_writer(store_path: str | Path, command: str) -> Iterator[tuple[SurveyStore, RunLog]]:
    """Hold the store's lock, open it for writing, refuse an empty store, and
    sweep the temporaries a killed writer left before anything resumes."""
    with StoreLock(store_path, command=command):
        store = SurveyStore.open(store_path, writable=True)
        if not store.swath_names():
            raise InputNotFoundError(f"{store.path}: no committed swath to {command} (run 'descatter ingest')")
        sweep_partials(store.path)
        yield store, RunLog(store.path)
