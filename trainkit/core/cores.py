"""How many CPU cores this process may use (affinity-aware, with a fallback off Linux)."""

from __future__ import annotations

import os


def usable_cores() -> int:
    """CPU cores this process may run on (affinity-aware)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # not on Linux
        return max(1, os.cpu_count() or 1)
