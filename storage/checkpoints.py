"""Done-flags: one small file per (stage, swath, chunk).

A chunk function writes its outputs first and its flag second, so a flag
proves the outputs are there (zarr chunk existence proves nothing: all-fill
chunks are not stored). The flag holds the stage fingerprint: a flag from a
run with other inputs or parameters does not count, so a changed parameter
redoes exactly the chunks it affects. No two chunks share a flag, so
workers write them concurrently without locking.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

from descatter.storage.atomic import write_bytes_atomic

CHECKPOINTS = "checkpoints"


class Checkpoints:
    """The done-flags of one stage on one swath, under one fingerprint."""

    def __init__(self, store_path: str | Path, stage: str, swath: str, fingerprint: str):
        self.root = Path(store_path) / CHECKPOINTS / stage / swath
        self.fingerprint = fingerprint

    def _flag(self, chunk: int) -> Path:
        return self.root / f"{chunk:08d}.done"

    def summary(self, chunk: int) -> dict[str, Any] | None:
        """The summary recorded with chunk's flag, or None if it is not done
        under this fingerprint."""
        try:
            doc = json.loads(self._flag(chunk).read_bytes())
        except (FileNotFoundError, ValueError):
            return None
        if doc.get("fingerprint") != self.fingerprint:
            return None
        return doc.get("summary", {})

    def is_done(self, chunk: int) -> bool:
        return self.summary(chunk) is not None

    def mark_done(self, chunk: int, summary: dict[str, Any] | None = None) -> None:
        doc = {"fingerprint": self.fingerprint, "summary": summary or {}}
        write_bytes_atomic(self._flag(chunk), json.dumps(doc).encode(), durable=False)

    def done_chunks(self) -> list[int]:
        if not self.root.is_dir():
            return []
        return sorted(int(p.stem) for p in self.root.glob("*.done") if self.is_done(int(p.stem)))

    def clear(self) -> None:
        """Drop every flag of this stage and swath (any fingerprint)."""
        for p in self.root.glob("*.done") if self.root.is_dir() else []:
            p.unlink(missing_ok=True)


def clear_swath(store_path: str | Path, swath: str) -> int:
    """Drop every done-flag that names ``swath``, in every stage: its own and
    those of keys that pair it with another swath (``a+b``). Returns the
    number of flag folders removed."""
    import shutil

    root = Path(store_path) / CHECKPOINTS
    removed = 0
    for stage in sorted(root.iterdir()) if root.is_dir() else []:
        for folder in sorted(stage.iterdir()) if stage.is_dir() else []:
            if swath in folder.name.split("+"):
                shutil.rmtree(folder, ignore_errors=True)
                removed += 1
    return removed
