"""A test-only fault hook: die at a deterministic point.

With ``DESCATTER_FAULT=<stage>:<n>`` in the environment, the process that
counts chunks of ``stage`` (the flow's driver, as chunk results arrive)
sends SIGKILL to its whole process group after the n-th chunk, taking its
workers with it: the hardest kind of interruption a run can suffer. Without
the variable :func:`fault_point` does nothing.
"""

from __future__ import annotations

import os
import signal

ENV = "DESCATTER_FAULT"
_counts: dict[str, int] = {}


def fault_point(stage: str) -> None:
    """Count one finished chunk of ``stage``; die if the hook says so."""
    spec = os.environ.get(ENV)
    if not spec:
        return
    name, _, n = spec.partition(":")
    if name != stage:
        return
    _counts[stage] = _counts.get(stage, 0) + 1
    if _counts[stage] >= int(n or 1):
        try:
            os.killpg(os.getpgid(0), signal.SIGKILL)
        finally:
            os.kill(os.getpid(), signal.SIGKILL)
