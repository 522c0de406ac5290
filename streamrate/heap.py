"""The C heap of a long-running service process: fixed malloc thresholds.

glibc's ``malloc`` raises its mmap threshold each time a large block is freed
(from 128 KiB up to 32 MiB), and from then on blocks of that size (a batch's
arrays, a checkpoint's slices) are carved from heaps that are seldom given back
to the system; with a thread per checkpoint they also spread over several
arenas. :func:`fix_malloc_thresholds` fixes the mmap and trim thresholds at
128 KiB (glibc's starting values), so large blocks keep their own mappings,
returned when freed, and a heap's free top is given back. Measured with
``python bench/bench_memory.py --service`` (one million entities, d=16): the
service's RSS growth fell from 1.59-1.78x to 1.37x the state's own bytes.

A threshold the user set in the environment (``MALLOC_MMAP_THRESHOLD_``,
``MALLOC_TRIM_THRESHOLD_``) is left as it is; on a C library without
``mallopt`` (not glibc) nothing is done.
"""

from __future__ import annotations

import ctypes
import os
import sys

M_TRIM_THRESHOLD = -1
M_MMAP_THRESHOLD = -3
THRESHOLD_BYTES = 128 * 1024


def fix_malloc_thresholds(threshold_bytes: int = THRESHOLD_BYTES) -> bool:
    """Fix glibc's mmap and trim thresholds; True when both were set here."""
    if not sys.platform.startswith("linux"):
        return False
    if "MALLOC_MMAP_THRESHOLD_" in os.environ or "MALLOC_TRIM_THRESHOLD_" in os.environ:
        return False
    try:
        mallopt = ctypes.CDLL(None).mallopt
    except (OSError, AttributeError):
        return False
    mallopt.argtypes = [ctypes.c_int, ctypes.c_int]
    mallopt.restype = ctypes.c_int
    ok_mmap = mallopt(M_MMAP_THRESHOLD, threshold_bytes) == 1
    ok_trim = mallopt(M_TRIM_THRESHOLD, threshold_bytes) == 1
    return ok_mmap and ok_trim
