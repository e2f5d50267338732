"""Removing a swath: the store keeps nothing of it (the run log aside).

The manifest is the commit record, so it is rewritten first: from that
moment the swath is gone for every reader and stage. What is left is then
deleted: its statistics (its own key and every cross-swath key that names
it), its done-flags in every stage, and its group (traces, headers,
geometry, spectra, corrected). A writer killed part-way leaves only
uncommitted leftovers; removing the same name again deletes them.
Station tables are append-only and keep the swath's stations: a station
with no trace left gets no pair and so the identity filter.
"""

from __future__ import annotations

import shutil
from dataclasses import dataclass, field
from pathlib import Path

from descatter.storage.checkpoints import CHECKPOINTS, clear_swath
from descatter.storage.estimation import STATS, remove_stats_naming
from descatter.storage.store import SWATHS, SurveyStore
from descatter.tasks.errors import SwathConflictError


@dataclass
class Removal:
    swath: str
    was_committed: bool
    traces: int = 0
    stats_keys: list[str] = field(default_factory=list)
    checkpoint_dirs: int = 0
    group_deleted: bool = False


def _names(key: str) -> list[str]:
    return key.split("+")


def remove_swath(store: SurveyStore, name: str) -> Removal:
    """Remove swath ``name`` (or the leftovers of an interrupted removal).

    The caller holds the store's writer lock. Raises
    :class:`SwathConflictError` naming the swaths present when there is
    neither a committed swath nor any leftover by that name.
    """
    records = store.manifest()
    committed = [r for r in records if r.name == name]
    report = Removal(swath=name, was_committed=bool(committed))
    leftovers = _leftovers(store.path, name)
    if not committed and not leftovers:
        names = ", ".join(r.name for r in records) or "none"
        raise SwathConflictError(f"{store.path}: no swath {name!r} to remove (swaths: {names})")
    if committed:
        report.traces = committed[0].n_traces
        # the commit point: one atomic manifest rewrite
        store.drop_from_manifest(name)
    report.stats_keys = remove_stats_naming(store.path, name)
    report.checkpoint_dirs = clear_swath(store.path, name)
    group = store.path / SWATHS / name
    if group.exists():
        shutil.rmtree(group)
        report.group_deleted = True
    return report


def _leftovers(root: Path, name: str) -> bool:
    """Whether anything keyed by ``name`` is left: its group, a statistics key
    (``stats/<key>``) or a stage's done-flags (``checkpoints/<stage>/<key>``)."""
    if (root / SWATHS / name).exists():
        return True
    keys = list((root / STATS).iterdir()) if (root / STATS).is_dir() else []
    for stage in (root / CHECKPOINTS).iterdir() if (root / CHECKPOINTS).is_dir() else []:
        keys += list(stage.iterdir()) if stage.is_dir() else []
    return any(p.is_dir() and name in _names(p.name) for p in keys)
