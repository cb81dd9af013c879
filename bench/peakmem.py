"""Peak resident memory of this process, for the bench scripts (Linux /proc, with fallbacks).

``start_memory()`` resets the kernel's peak resident set where it allows it and returns the
resident set now; ``peak_mb()`` is the peak since (MiB). The rise of a piece of work is
``peak_mb() - start_memory()`` taken around it.
"""

from __future__ import annotations

import resource


def status_mb(key: str) -> float | None:
    """A memory line of /proc/self/status (VmRSS, VmHWM, ...) in MiB, None where unreadable."""
    try:
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith(key + ":"):
                    return float(line.split()[1]) / 1024.0  # kB
    except OSError:
        pass
    return None


def start_memory() -> float:
    """Reset the peak resident set where the kernel allows it; the resident set now (MiB)."""
    try:
        with open("/proc/self/clear_refs", "w") as fh:
            fh.write("5")  # resets the peak resident set (Linux >= 4.0)
    except OSError:
        pass
    now = status_mb("VmRSS")
    return now if now is not None else peak_mb()


def peak_mb() -> float:
    """The peak resident set (MiB) since :func:`start_memory` (or the process's start)."""
    peak = status_mb("VmHWM")
    if peak is not None:
        return peak
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # Linux: KiB
