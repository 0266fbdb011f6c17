"""treewright refine: split-merge refinement of a grammar as a config says, into one run folder."""

from __future__ import annotations

import argparse

EXAMPLES = """examples:
  treewright refine configs/refine_demo_treebank.yaml
  treewright refine configs/refine_turkish_web.yaml refine.cycles=3 output.run_dir=runs/tr3

Overrides are dotted key=value pairs read as YAML scalars; they win over the file. Every option
is checked before any work starts.

The run folder (output.run_dir, default runs/<config name>) receives config.yaml (resolved),
refine.log, metrics.jsonl, tensorboard/, coarse.pcfg (the unrefined start), cycle-<c>.pcfg and
summary-<c>.txt/.json per cycle, and the result grammar.pcfg with summary.txt/.json. Refined
symbols are named NAME@k (subcategory k of NAME); score, parse and sample load the grammar.
"""


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("config", help="YAML config file")
    p.add_argument("overrides", nargs="*", metavar="key=value", help="dotted config overrides")


def run(args) -> int:
    import sys
    from pathlib import Path

    from treewright.refine import load_refine_config, refine

    cfg = load_refine_config(args.config, args.overrides)
    run_dir = cfg.output.run_dir or Path("runs") / Path(args.config).stem
    result = refine(cfg, run_dir, stream=sys.stdout, config_source=args.config)
    print(result.grammar_path)
    return 0
