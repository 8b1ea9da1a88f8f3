"""What this machine has to give: memory available to new work, and sizes in words."""

from __future__ import annotations

import os

__all__ = ["available_memory", "format_bytes"]


def available_memory() -> int | None:
    """Bytes of memory available to a new allocation (MemAvailable of
    /proc/meminfo, else free pages × page size), or None when unknown."""
    try:
        with open("/proc/meminfo") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    try:
        return os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    except (ValueError, OSError, AttributeError):
        return None


def format_bytes(b: float) -> str:
    for unit, size in (("TB", 1e12), ("GB", 1e9), ("MB", 1e6), ("kB", 1e3)):
        if b >= size:
            return f"{b / size:.3g} {unit}"
    return f"{int(b)} bytes"
