"""What this machine has to offer: the memory free for a computation, read once per question."""

from __future__ import annotations

import os


def available_memory() -> int:
    """Bytes of memory available to a new computation (Linux's MemAvailable; else 80% of physical memory)."""
    try:
        with open("/proc/meminfo", encoding="ascii") as handle:
            for line in handle:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    try:
        return int(0.8 * os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES"))
    except (ValueError, OSError, AttributeError):
        return 8 * 2**30


def gigabytes(size: float) -> str:
    return f"{size / 2**30:.1f} GB"
