"""Shared by the benchmark scripts (run as `python benchmarks/NAME.py`)."""

from __future__ import annotations


def peak_rss_mb() -> float:
    """This process's peak resident memory (VmHWM), MB.

    Not getrusage: on Linux its maximum survives fork and exec, so a child would report
    its parent's peak.
    """
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024
    return float("nan")
