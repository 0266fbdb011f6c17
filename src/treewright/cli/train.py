"""treewright train: induce a grammar as a config says, into one run folder."""

from __future__ import annotations

import argparse

EXAMPLES = """examples:
  treewright train configs/em_demo.yaml
  treewright train configs/vb_demo.yaml prior.concentration=0.1 output.run_dir=runs/vb-sparse
  treewright train --resume runs/em_demo

Overrides are dotted key=value pairs read as YAML scalars; they win over the file. Every option
is checked before training starts ('treewright validate CONFIG' does only that, and
'treewright validate --options' lists every option with its default).

The run folder (output.run_dir, default runs/<config name>) receives config.yaml (the resolved
config), train.log, metrics.jsonl, tensorboard/, checkpoint.ckpt, restart-<r>.pcfg and the
result, grammar.pcfg. --resume continues from checkpoint.ckpt with the saved config; in float64
it ends with exactly the grammar an uninterrupted run gives. Ctrl-C stops at the next step
with a checkpoint and prints the --resume command (a second Ctrl-C stops at once).
"""


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("config", nargs="?", help="YAML config file")
    p.add_argument("overrides", nargs="*", metavar="key=value", help="dotted config overrides")
    p.add_argument("--resume", metavar="RUN", help="continue the run in this folder")


def run(args) -> int:
    import sys
    from pathlib import Path

    from treewright.errors import InputError
    from treewright.train import TrainingDiverged, load_train_config, resume, train

    try:
        if args.resume is not None:
            if args.config is not None or args.overrides:
                raise InputError("--resume takes the config saved in the run folder; give no "
                                 "config file or overrides with it")
            trainer, _ = resume(args.resume)
        else:
            if args.config is None:
                raise InputError("give a config file (or --resume RUN)")
            cfg = load_train_config(args.config, args.overrides)
            run_dir = cfg.output.run_dir or Path("runs") / Path(args.config).stem
            trainer = train(cfg, run_dir, config_source=args.config)
    except TrainingDiverged as err:
        print(f"treewright train: {err}", file=sys.stderr)
        return 1
    if not hasattr(trainer, "grammar_path_"):  # Ctrl-C: stopped after a checkpoint
        print(f"treewright train: interrupted; the checkpoint {trainer.run_dir / 'checkpoint.ckpt'}"
              f" holds the run so far. Continue it with: treewright train --resume "
              f"{trainer.run_dir}", file=sys.stderr)
        return 130
    print(trainer.grammar_path_)
    return 0
