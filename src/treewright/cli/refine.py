"""treewright refine: split-merge refinement of a grammar as a config says, into one run folder."""

from __future__ import annotations

import argparse

EXAMPLES = """examples:
  treewright refine configs/refine_demo_treebank.yaml
  treewright refine configs/refine_turkish_web.yaml refine.cycles=3 output.run_dir=runs/tr3
  treewright refine --resume runs/tr3

Overrides are dotted key=value pairs read as YAML scalars; they win over the file. Every option
is checked before any work starts.

The run folder (output.run_dir, default runs/<config name>) receives config.yaml (resolved),
refine.log, metrics.jsonl, tensorboard/, coarse.pcfg (the unrefined start), cycle-<c>.pcfg and
summary-<c>.txt/.json per cycle, and the result grammar.pcfg with summary.txt/.json. Refined
symbols are named NAME·k (subcategory k of NAME); score, parse and sample load the grammar.

refine.ckpt is written after every cycle. --resume RUN continues an interrupted run (Ctrl-C,
a kill) from the last cycle written, with the config saved in the folder, and ends with exactly
the grammar the uninterrupted run gives.
"""


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("config", nargs="?", help="YAML config file")
    p.add_argument("overrides", nargs="*", metavar="key=value", help="dotted config overrides")
    p.add_argument("--resume", metavar="RUN",
                   help="continue the interrupted refinement in run folder RUN")


def run(args) -> int:
    import sys

    from treewright.cli.common import config_and_folder
    from treewright.refine import load_refine_config
    from treewright.refiner import refine, refine_resume
    from treewright.runfolder import RunFolder

    cfg, run_dir = config_and_folder(args, load_refine_config)
    try:
        if cfg is None:
            result = refine_resume(run_dir, stream=sys.stdout)
        else:
            result = refine(cfg, run_dir, stream=sys.stdout, config_source=args.config)
    except KeyboardInterrupt:
        print(f"treewright refine: interrupted; {RunFolder(run_dir, 'refine').checkpoint} holds "
              f"every cycle finished. Continue with: treewright refine --resume {run_dir}",
              file=sys.stderr)
        return 130
    print(result.grammar_path)
    return 0
