"""The base of every config section model (kept apart so that section
modules and :mod:`descatter.tasks.config` import it without a cycle)."""

from __future__ import annotations

from pydantic import BaseModel, ConfigDict


def _unit(unit: str) -> dict:
    return {"unit": unit}


class _Section(BaseModel):
    model_config = ConfigDict(extra="forbid", validate_assignment=True, frozen=False)
