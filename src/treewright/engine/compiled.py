"""Loops compiled to machine code (numba), for the max-semiring work that has no BLAS kernel
and for max-rule-product's walk over anchored rules (`engine.anchored`), one tiny sum each.

`jit` compiles a function of numpy arrays on its first call, once per argument types. The
machine code is cached on disk beside the module (or, where that folder cannot be written, in
numba's per-user cache folder), so only the first process after an install or a change of the
source pays the compilation: the Viterbi pass's two loops take about 8 s to compile on the
2-core reference machine and a few milliseconds to load. Where no cache folder can be written
at all, each process compiles them again.
"""

from __future__ import annotations

from typing import Callable


def jit(function: Callable) -> Callable:
    """`function` compiled by numba (no Python objects inside; the GIL released), cached on
    disk when a cache folder can be written."""
    import numba

    try:
        return numba.njit(nogil=True, cache=True)(function)
    except RuntimeError:       # "cannot cache function ...: no locator available"
        return numba.njit(nogil=True)(function)
