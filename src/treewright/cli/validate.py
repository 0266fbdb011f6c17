"""treewright validate: check a training config (types, ranges, combinations) and do nothing
else."""

from __future__ import annotations

import argparse

EXAMPLES = """examples:
  treewright validate configs/em_demo.yaml
  treewright validate configs/em_demo.yaml train.epochs=5 optimizer.lr=1e-3
  treewright validate --options

Every problem is reported at once, each with its key and the file line or override it came
from. Data files are not read (they may not exist yet on this machine).
"""


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("config", nargs="?", help="YAML config file")
    p.add_argument("overrides", nargs="*", metavar="key=value", help="dotted config overrides")
    p.add_argument("--options", action="store_true",
                   help="list every option with its type, default and allowed values")
    p.add_argument("--print", action="store_true", dest="show",
                   help="print the resolved config as YAML")


def run(args) -> int:
    from treewright.config import describe_config, dump_config_yaml
    from treewright.errors import InputError
    from treewright.train import TrainConfig, load_train_config

    if args.options:
        print(describe_config(TrainConfig), end="")
        return 0
    if args.config is None:
        raise InputError("give a config file to validate (or --options)")
    cfg = load_train_config(args.config, args.overrides)
    if args.show:
        print(dump_config_yaml(cfg), end="")
    else:
        print(f"{args.config}: valid ({cfg.train.method}, {cfg.model.parameterization})")
    return 0
