"""What this machine has: its physical memory."""

from __future__ import annotations

import os

__all__ = ["machine_memory"]


def machine_memory() -> int:
    """Physical memory of this machine [bytes] (0 when the system does not say)."""
    try:
        return int(os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES"))
    except (ValueError, OSError, AttributeError):
        return 0
