"""Options every command shares: the torch thread count and key=value overrides in any order."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

from treewright.cli import build_parser, parse_arguments

SRC = Path(__file__).resolve().parent.parent / "src"

# Runs `python -m treewright score x y ...` with the score command replaced by one that prints
# torch's own thread count, so the check reads torch itself rather than our bookkeeping.
_PROBE = """
import runpy, sys
import treewright.cli.score as score
def report(args):
    import torch
    print(torch.get_num_threads())
    return 0
score.run = report
sys.argv = ["treewright", "score", "grammar", "text", *sys.argv[1:]]
runpy.run_module("treewright", run_name="__main__")
"""


def _threads(*argv: str, omp: str | None = None) -> int:
    env = {k: v for k, v in os.environ.items() if k != "OMP_NUM_THREADS"}
    env["PYTHONPATH"] = str(SRC)
    if omp is not None:
        env["OMP_NUM_THREADS"] = omp
    out = subprocess.run([sys.executable, "-c", _PROBE, *argv], capture_output=True, text=True,
                         env=env, check=True)
    return int(out.stdout.strip())


def test_one_torch_thread_by_default_and_overrides_win():
    # torch.get_num_threads() is torch's own report; without our default it is the core count
    # (or $OMP_NUM_THREADS capped at it), so 3 on a 2-core machine can only come from us.
    assert _threads() == 1
    assert _threads("--threads", "3") == 3
    assert _threads(omp="3") == 3
    assert _threads("--threads", "2", omp="3") == 2


def test_bad_thread_counts_are_refused_in_one_line():
    env = {**os.environ, "PYTHONPATH": str(SRC), "OMP_NUM_THREADS": "many"}
    out = subprocess.run([sys.executable, "-c", _PROBE], capture_output=True, text=True, env=env)
    assert out.returncode == 1 and "OMP_NUM_THREADS" in out.stderr
    assert "Traceback" not in out.stderr


@pytest.mark.parametrize("command", ["train", "refine", "validate"])
def test_overrides_and_flags_in_any_order(command):
    # Reference: argparse's own parse of the canonical order (all overrides before any flag).
    parser = build_parser()
    flag = {"train": ["--workers", "2"], "refine": ["--resume", "runs/x"],
            "validate": ["--print"]}[command]
    canonical = parser.parse_args([command, "c.yaml", "a.b=1", "c.d=x y", *flag])
    for argv in ([command, "c.yaml", "a.b=1", *flag, "c.d=x y"],
                 [command, *flag, "c.yaml", "a.b=1", "c.d=x y"]):
        assert vars(parse_arguments(parser, argv)) == vars(canonical)


def test_stray_words_are_still_unrecognized(capsys):
    parser = build_parser()
    with pytest.raises(SystemExit):
        parse_arguments(parser, ["train", "c.yaml", "--workers", "2", "stray"])
    assert "unrecognized arguments: stray" in capsys.readouterr().err
    with pytest.raises(SystemExit):  # parse takes no overrides
        parse_arguments(parser, ["parse", "g.pcfg", "t.txt", "--scores", "a=1"])
