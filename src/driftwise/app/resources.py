"""What the heavy commands (connect, backtrack) check before they start: memory, and a progress bar.

Memory: the request's estimated peak (from the library's ``*_memory_bytes``) is compared with the memory the
system reports available (``MemAvailable`` of /proc/meminfo on Linux, else the free physical pages of
``os.sysconf``); a request above it stops with exit 2 before anything large is allocated.
Progress: :class:`driftwise.progress.Progress` on stderr with the estimated remaining time (a bar on a terminal,
a plain line every few seconds in a pipe or a log), never with ``--quiet`` or ``--json``.
"""

from __future__ import annotations

import os
import sys
from typing import Any

from ..errors import InputError
from ..progress import Progress

MEMORY_HEADROOM = 0.8   # use at most this share of the available memory


def available_memory_bytes() -> int | None:
    """Bytes of memory available to a new allocation, or None when the system does not say."""
    try:
        with open("/proc/meminfo", encoding="ascii") as handle:
            for line in handle:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    try:
        return int(os.sysconf("SC_AVPHYS_PAGES")) * int(os.sysconf("SC_PAGE_SIZE"))
    except (ValueError, OSError, AttributeError):
        return None


def _gib(n: float) -> str:
    return f"{n / 2**30:.3g} GiB"


def check_memory(need_bytes: int, what: str, advice: str) -> None:
    """InputError (exit 2) when ``need_bytes`` exceeds 80 % of the available memory; ``advice`` says what to shrink."""
    available = available_memory_bytes()
    if available is not None and need_bytes > MEMORY_HEADROOM * available:
        raise InputError(f"{what} would need about {_gib(need_bytes)} of memory but only {_gib(available)} is "
                         f"available; {advice}")


def bar(total: int, quiet: bool, description: str, unit: str) -> Any:
    """Progress on stderr (:class:`driftwise.progress.Progress`) with a description and unit; none when quiet."""
    return Progress(total, enabled=not quiet, desc=description, unit=unit)


def say(text: str, quiet: bool) -> None:
    """One line on stderr unless quiet (the plan of a long run: its size, memory and expected time)."""
    if not quiet:
        print(text, file=sys.stderr)
