"""Keep the C heap of an API process from being handed back to the kernel per request.

A 1000-point request allocates a few MiB of numpy temporaries. glibc's malloc sets
its mmap and trim thresholds from the blocks it has seen, and once a large request
has moved them (a JSON batch, for one), the heap top was returned to the kernel and
faulted back in on every request: packed 1000-point requests fell from about 1,900
to 1,000 per second and stayed there (loadtests/bench_http.py runs the cases in that
order). Fixed thresholds, at glibc's own 64-bit ceilings for the adaptive ones, keep
a steady heap: blocks up to 32 MiB come from it, and up to 64 MiB of free top is kept.
"""

from __future__ import annotations

import ctypes
import logging

log = logging.getLogger("mixscore")

# mallopt parameters, from glibc's malloc.h.
M_TRIM_THRESHOLD = -1
M_MMAP_THRESHOLD = -3
MMAP_THRESHOLD = 32 * 2**20
TRIM_THRESHOLD = 2 * MMAP_THRESHOLD


def keep_heap() -> bool:
    """Fix the thresholds when the C library is glibc; True when they were set."""
    try:
        mallopt = ctypes.CDLL(None).mallopt  # the C library this process runs on
    except (OSError, AttributeError):
        log.debug("no mallopt in this C library: malloc keeps its own thresholds")
        return False
    return bool(mallopt(M_MMAP_THRESHOLD, MMAP_THRESHOLD)
                and mallopt(M_TRIM_THRESHOLD, TRIM_THRESHOLD))
