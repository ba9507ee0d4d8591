"""Resident memory of this process: now, and its peak since the current run started.

The kernel's peak (getrusage, /proc/self/status VmHWM) only ever grows, so in a sweep every run
would report the largest peak of all runs before it. On Linux the runner starts a new window at
the start of each run (writing "5" to /proc/self/clear_refs resets VmHWM to the current size,
see proc(5)), so a run's `peak_rss_mb` is its own. Elsewhere the peak is the process's.
"""

from __future__ import annotations

import sys
from pathlib import Path

import psutil

__all__ = ["current_rss_mb", "peak_rss_mb", "reset_peak_rss"]

_STATUS = Path("/proc/self/status")
_CLEAR_REFS = Path("/proc/self/clear_refs")


def _status_mb(field: str) -> float | None:
    """A `kB` field of /proc/self/status in MiB, or None where there is no such file."""
    try:
        text = _STATUS.read_text(encoding="ascii")
    except OSError:
        return None
    for line in text.splitlines():
        if line.startswith(field + ":"):
            return int(line.split()[1]) / 1024
    return None


def reset_peak_rss() -> bool:
    """Start a new peak window (Linux only); False where the kernel offers no reset."""
    try:
        # a kernel control file, not data: it is written in place by design
        _CLEAR_REFS.write_text("5", encoding="ascii")
    except OSError:
        return False
    return True


def peak_rss_mb() -> float:
    """Peak resident memory in MiB: since the last `reset_peak_rss` on Linux, of the whole process elsewhere."""
    peak = _status_mb("VmHWM")
    if peak is not None:
        return peak
    try:
        import resource  # late: POSIX only

        value = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
        return value / (1024 * 1024) if sys.platform == "darwin" else value / 1024  # bytes on macOS, KiB elsewhere
    except ImportError:  # Windows
        return current_rss_mb()


def current_rss_mb() -> float:
    """Resident memory right now, in MiB."""
    return float(psutil.Process().memory_info().rss) / (1024 * 1024)
