"""Small file primitives: atomic writes and the sweep of torn temporaries."""

from __future__ import annotations

import json
import logging
import os
import uuid
from pathlib import Path
from typing import Any

log = logging.getLogger(__name__)

PARTIAL_SUFFIX = ".partial"


def write_bytes_atomic(path: Path, data: bytes, *, durable: bool = True) -> None:
    """Write ``data`` to ``path`` so that a reader sees the old file or the new
    one, never a torn one: write a temporary beside it, then rename.

    ``durable`` adds an fsync before the rename (for commit records such as
    the manifest); done-flags skip it, since a lost flag only redoes a chunk.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f"{path.name}.{uuid.uuid4().hex}{PARTIAL_SUFFIX}")
    try:
        with open(tmp, "wb") as fh:
            fh.write(data)
            if durable:
                fh.flush()
                os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def write_json_atomic(path: Path, document: Any) -> None:
    """Atomically write ``document`` as indented JSON (see :func:`write_bytes_atomic`)."""
    write_bytes_atomic(path, (json.dumps(document, indent=2, sort_keys=False) + "\n").encode())


def read_json(path: Path) -> Any:
    with open(path, "rb") as fh:
        return json.loads(fh.read())


def sweep_partials(root: Path) -> list[Path]:
    """Delete the ``*.partial`` temporaries a killed writer left under ``root``.

    zarr's LocalStore and :func:`write_bytes_atomic` write every key through
    such a temporary and rename it; a kill between the two leaves one behind,
    and it would list as a key. Only the single writer (the lock holder) may
    call this. Returns the removed paths.
    """
    removed = []
    for p in Path(root).rglob(f"*{PARTIAL_SUFFIX}"):
        if p.is_file():
            p.unlink(missing_ok=True)
            removed.append(p)
    if removed:
        log.info("swept %d leftover partial files under %s", len(removed), root)
    return removed
