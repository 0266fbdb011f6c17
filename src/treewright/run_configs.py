"""The two kinds of run config, told apart from their contents: `treewright train` configs
(`treewright.train.TrainConfig`) and `treewright refine` configs
(`treewright.refine.RefineConfig`). `validate` and `validate --options` use this; a notebook user
can call `load_run_config` on any shipped config.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any, Sequence

import yaml

from treewright.errors import InputError

KINDS = ("train", "refine")

# Keys only a refine config has: its cycle and tree-form sections, and data.start.
_REFINE_SECTIONS = ("refine", "tree_form")


def schema(kind: str) -> type:
    """The config dataclass of `kind` ("train" or "refine")."""
    if kind == "train":
        from treewright.train import TrainConfig
        return TrainConfig
    if kind == "refine":
        from treewright.refine import RefineConfig
        return RefineConfig
    raise ValueError(f"kind must be one of {KINDS}, not {kind!r}")


def config_kind(path: str | Path, overrides: Sequence[str] = ()) -> str:
    """"refine" when the file (or an override) has a `refine` or `tree_form` section or a
    `data.start` key, else "train". A file that cannot be read is left to the loader, which
    names the problem."""
    keys = {text.partition("=")[0].strip() for text in overrides}
    try:
        data: Any = yaml.safe_load(Path(path).read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, yaml.YAMLError):
        data = None
    if isinstance(data, dict):
        keys |= {str(k) for k in data}
        if isinstance(data.get("data"), dict) and "start" in data["data"]:
            keys.add("data.start")
    refine = any(k.split(".")[0] in _REFINE_SECTIONS or k == "data.start" for k in keys)
    return "refine" if refine else "train"


def load_run_config(path: str | Path, overrides: Sequence[str] = (), kind: str = "auto"):
    """(kind, checked config) of a train or refine config file with overrides. `kind` "auto"
    asks `config_kind`. Raises ConfigError listing every problem, InputError for a file that
    cannot be read."""
    if kind == "auto":
        kind = config_kind(path, overrides)
    if kind == "train":
        from treewright.train import load_train_config
        return kind, load_train_config(path, overrides)
    if kind == "refine":
        from treewright.refine import load_refine_config
        return kind, load_refine_config(path, overrides)
    raise InputError(f"a config kind is one of {', '.join(KINDS)}, not {kind!r}")
