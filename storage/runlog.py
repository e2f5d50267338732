"""The run log: JSON lines beside the arrays, appended by the lock holder.

One record per event: ``{"time", "run", "stage", "event", ...}`` with event
``start``, ``end``, ``batch`` (a chunk or job done, with its ``seconds``;
the solve's: one per task of its graph), ``task`` (other worker work of a
stage with its ``seconds``, such as ingest's per-swath geometry), ``skip``,
``warning`` or ``error``.
"""

from __future__ import annotations

import json
import os
import time
import uuid
from pathlib import Path
from typing import Any, Iterator

RUNLOG_NAME = "runlog.jsonl"


class RunLog:
    def __init__(self, store_path: str | Path, run_id: str | None = None):
        self.path = Path(store_path) / RUNLOG_NAME
        self.run_id = run_id or time.strftime("%Y%m%dT%H%M%S") + "-" + uuid.uuid4().hex[:6]

    def write(self, stage: str, event: str, **fields: Any) -> dict[str, Any]:
        now = time.time()
        record = {
            "time": time.strftime("%Y-%m-%dT%H:%M:%S%z", time.localtime(now)),
            "t": round(now, 3),
            "run": self.run_id,
            "stage": stage,
            "event": event,
            **fields,
        }
        line = json.dumps(record, default=str) + "\n"
        # One write() of one line on an O_APPEND file: lines never interleave.
        fd = os.open(self.path, os.O_WRONLY | os.O_CREAT | os.O_APPEND, 0o644)
        try:
            os.write(fd, line.encode())
        finally:
            os.close(fd)
        return record


def read_runlog(store_path: str | Path) -> Iterator[dict[str, Any]]:
    """Every record of the run log, oldest first (a torn last line is skipped)."""
    path = Path(store_path) / RUNLOG_NAME
    if not path.exists():
        return
    with open(path, "rb") as fh:
        for line in fh:
            try:
                yield json.loads(line)
            except ValueError:
                continue
