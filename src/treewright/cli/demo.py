"""treewright demo: the whole job on the embedded demo corpus."""

from __future__ import annotations

import argparse

EXAMPLES = """examples:
  treewright demo                       # about two minutes on a 2-core machine
  treewright demo --out /tmp/demo --quick

Stages: read the corpus, induce a grammar with EM, track the curves, parse the test set, score it
against gold beside the baselines, refine by split-merge, export the grammar, write the report.
"""


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--out", default="runs/demo", help="output folder (default runs/demo)")
    p.add_argument("--quick", action="store_true",
                   help="a reduced budget (a slice of the corpus, few iterations): seconds")


def run(args) -> int:
    from treewright.demo import run_demo

    run_demo(args.out, "quick" if args.quick else "full")
    return 0
