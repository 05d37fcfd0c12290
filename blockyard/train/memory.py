"""Resident-memory probes shared by the trainer and the benchmarks.

``peak_rss_bytes`` is the process's high-water mark of resident memory as the kernel keeps it
(getrusage ``ru_maxrss``: KiB on Linux, bytes on macOS), so a probe after each train step sees
the peak of that step even if it was released before the probe ran. The benchmarks use the
same functions.
"""

from __future__ import annotations

import resource
import sys

import psutil


def peak_rss_bytes() -> int:
    """Peak resident set size of this process so far, in bytes.

    The kernel refreshes its high-water mark lazily, so it can trail the current RSS by a few
    pages; the larger of the two is the peak.
    """
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return max(int(peak if sys.platform == "darwin" else peak * 1024), current_rss_bytes())


def current_rss_bytes() -> int:
    """Resident set size of this process now, in bytes."""
    return int(psutil.Process().memory_info().rss)


class PeakRSS:
    """The largest :func:`peak_rss_bytes` seen by :meth:`sample` (plus an earlier segment's peak)."""

    def __init__(self, previous_peak: int = 0) -> None:
        self.peak = int(previous_peak)

    def sample(self) -> int:
        self.peak = max(self.peak, peak_rss_bytes())
        return self.peak
