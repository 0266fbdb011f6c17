"""treewright validate: check a training, refine or segment config (types, ranges,
combinations) and do nothing else."""

from __future__ import annotations

import argparse
import dataclasses
import sys
from pathlib import Path

EXAMPLES = """examples:
  treewright validate configs/em_demo.yaml
  treewright validate configs/em_demo.yaml train.epochs=5 optimizer.lr=1e-3
  treewright validate configs/refine_demo_treebank.yaml refine.cycles=3
  treewright validate --options --kind refine

A config is taken as a refine config when it has a refine or tree_form section or a data.start
key, as a segment config when it has a sampler or grammar section or a data.text key, and as a
training config otherwise (--kind says which instead). Every problem is reported at once, each
with its key and the file line or override it came from. Data files are not read (they may not
exist yet on this machine), but a path option naming nothing that exists is noted on standard
error (the exit status stays 0).
"""


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("config", nargs="?", help="YAML config file")
    p.add_argument("overrides", nargs="*", metavar="key=value", help="dotted config overrides")
    p.add_argument("--options", action="store_true",
                   help="list every option with its type, default and allowed values")
    p.add_argument("--kind", choices=("auto", "train", "refine", "segment"), default="auto",
                   help="the config's kind (default auto: from its sections); with --options, "
                        "list only that kind's options")
    p.add_argument("--print", action="store_true", dest="show",
                   help="print the resolved config as YAML")


def run(args) -> int:
    from treewright.config import describe_config, dump_config_yaml
    from treewright.errors import InputError
    from treewright.run_configs import KINDS, load_run_config, schema

    if args.options:
        kinds = KINDS if args.kind == "auto" else (args.kind,)
        for k, kind in enumerate(kinds):
            if len(kinds) > 1:
                print(("\n" if k else "") + f"# {kind} configs (treewright {kind} CONFIG)")
            print(describe_config(schema(kind)), end="")
        return 0
    if args.config is None:
        raise InputError("give a config file to validate (or --options)")
    kind, cfg = load_run_config(args.config, args.overrides, args.kind)
    if args.show:
        print(dump_config_yaml(cfg), end="")
    elif kind == "train":
        print(f"{args.config}: valid training config ({cfg.train.method}, "
              f"{cfg.model.parameterization})")
    elif kind == "refine":
        print(f"{args.config}: valid refine config ({cfg.data.start} start, "
              f"{cfg.refine.cycles} cycles)")
    else:
        print(f"{args.config}: valid segment config ({cfg.sampler.sweeps} sweeps, "
              f"{cfg.sampler.chains} chain{'s' if cfg.sampler.chains != 1 else ''})")
    for key, path in missing_paths(cfg):
        print(f"note: {key}: {path} does not exist (yet)", file=sys.stderr)
    return 0


def missing_paths(cfg, prefix: str = "") -> list[tuple[str, Path]]:
    """(key, path) of every path option of `cfg` (a config dataclass) outside its output
    section that names nothing that exists: the files and run folders a run will read."""
    out = []
    for field in dataclasses.fields(cfg):
        key, value = prefix + field.name, getattr(cfg, field.name)
        if key == "output":
            continue
        if dataclasses.is_dataclass(value):
            out += missing_paths(value, key + ".")
            continue
        values = value if isinstance(value, list) else [value]
        out += [(key, v) for v in values if isinstance(v, Path) and not v.exists()]
    return out
