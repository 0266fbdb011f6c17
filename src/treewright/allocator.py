"""Keep freed tensor memory inside the process, so the engine's per-width temporaries reuse it.

The inside and outside passes allocate tensors of a few MiB for every span width and free them a
moment later. glibc's malloc serves such blocks either from fresh `mmap` pages or from the top of
the heap, and hands freed memory at the top back to the system once it passes a trim threshold;
the next width then page-faults the same memory in again. On the 2-core reference machine this
made forward-pass timings bimodal (thousands of minor page faults per pass in the bad state,
about a third of the time). Raising the two thresholds with mallopt(3) (`M_MMAP_THRESHOLD`,
`M_TRIM_THRESHOLD`) keeps the memory mapped and the faults at zero. Swapping in another allocator
with LD_PRELOAD is the usual way to get the same effect for PyTorch on CPU (common practice);
this needs nothing installed.

The peak resident size is unchanged (it is set by what is live at once); memory freed after the
peak stays with the process until it exits, which suits a training or benchmark process.
`tune_allocator` is called by the command line and the benchmark scripts; library users may call
it once at start-up.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import os
import sys

_M_TRIM_THRESHOLD = -1  # <malloc.h>
_M_MMAP_THRESHOLD = -3
MMAP_THRESHOLD = 32 * 2 ** 20   # the largest value glibc accepts on 64-bit systems
TRIM_THRESHOLD = 2 ** 30

_tuned = False


def tune_allocator() -> bool:
    """Raise glibc's mmap and trim thresholds once per process; True if they are in effect.

    Does nothing (and returns False) off Linux/glibc, or when the user has set glibc's own
    allocator variables, which then take precedence.
    """
    global _tuned
    if _tuned:
        return True
    if not sys.platform.startswith("linux"):
        return False
    if any(k in os.environ for k in ("MALLOC_MMAP_THRESHOLD_", "MALLOC_TRIM_THRESHOLD_",
                                     "GLIBC_TUNABLES")):
        return False
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        mallopt = libc.mallopt
    except (OSError, AttributeError):
        return False
    mallopt.argtypes = [ctypes.c_int, ctypes.c_int]
    mallopt.restype = ctypes.c_int
    _tuned = bool(mallopt(_M_MMAP_THRESHOLD, MMAP_THRESHOLD)) and \
        bool(mallopt(_M_TRIM_THRESHOLD, TRIM_THRESHOLD))
    return _tuned
