"""How many torch threads a process uses: one unless told otherwise.

On a machine shared with other work, torch's default (one thread per core) collapses: on the
2-core reference machine beside one busy process, a small training ran 30 times slower with two
threads than with one (README, "Benchmarks"). Parallel work is better spread over processes
(`treewright train --workers N`), each with one thread. Every `treewright` command therefore runs
with `threads_wanted(option)` threads: the `--threads N` option, else the `OMP_NUM_THREADS`
environment variable (the standard OpenMP setting, which torch itself reads), else 1.
"""

from __future__ import annotations

import os
from typing import Mapping

from treewright.errors import InputError

ENVIRONMENT = "OMP_NUM_THREADS"


def threads_wanted(option: int | None = None,
                   environ: Mapping[str, str] | None = None) -> int:
    """The thread count: `option` if given, else $OMP_NUM_THREADS if set, else 1.
    Raises InputError for a count below 1 or an environment value that is not an integer."""
    if option is not None:
        if option < 1:
            raise InputError(f"--threads must be at least 1, got {option}")
        return option
    environ = os.environ if environ is None else environ
    text = environ.get(ENVIRONMENT, "").strip()
    if not text:
        return 1
    try:
        count = int(text)
    except ValueError:
        raise InputError(f"{ENVIRONMENT}={text!r} is not a whole number of threads") from None
    if count < 1:
        raise InputError(f"{ENVIRONMENT} must be at least 1, got {count}")
    return count


def use_threads(count: int) -> None:
    """Run torch with `count` intra-op threads in this process and in the processes it starts
    (worker processes inherit $OMP_NUM_THREADS). Set explicitly rather than through the
    variable alone, because torch caps a count read from the environment at the core count."""
    import torch

    os.environ[ENVIRONMENT] = str(count)
    torch.set_num_threads(count)
