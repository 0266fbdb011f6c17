"""Running the command line inside a test: exit code, standard output and standard error."""

from __future__ import annotations

import io
from contextlib import redirect_stderr, redirect_stdout

from treewright.cli import main


def cli(*argv) -> tuple[int, str, str]:
    """`treewright ARGV...` in this process (each argument turned into a string)."""
    out, err = io.StringIO(), io.StringIO()
    with redirect_stdout(out), redirect_stderr(err):
        code = main([str(a) for a in argv])
    return code, out.getvalue(), err.getvalue()
