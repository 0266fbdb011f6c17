"""The kinds of run config, told apart from their contents: `treewright train` configs
(`treewright.train.TrainConfig`), `treewright refine` configs
(`treewright.refine.RefineConfig`) and `treewright segment` configs
(`treewright.adaptor.config.SegmentConfig`). `validate` and `validate --options` use this; a
notebook user can call `load_run_config` on any shipped config.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any, Sequence

import yaml

from treewright.errors import InputError

KINDS = ("train", "refine", "segment")

# Keys only a refine config has: its cycle and tree-form sections, and data.start.
_REFINE_SECTIONS = ("refine", "tree_form")
# Sections only a segment config has.
_SEGMENT_SECTIONS = ("sampler", "grammar")


def schema(kind: str) -> type:
    """The config dataclass of `kind` ("train" or "refine")."""
    if kind == "train":
        from treewright.train import TrainConfig
        return TrainConfig
    if kind == "refine":
        from treewright.refine import RefineConfig
        return RefineConfig
    if kind == "segment":
        from treewright.adaptor.config import SegmentConfig
        return SegmentConfig
    raise ValueError(f"kind must be one of {KINDS}, not {kind!r}")


def config_kind(path: str | Path, overrides: Sequence[str] = ()) -> str:
    """"refine" when the file (or an override) has a `refine` or `tree_form` section or a
    `data.start` key, "segment" when it has a `sampler` or `grammar` section or a `data.text`
    key, else "train". A file that cannot be read is left to the loader, which names the
    problem."""
    keys = {text.partition("=")[0].strip() for text in overrides}
    try:
        data: Any = yaml.safe_load(Path(path).read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, yaml.YAMLError):
        data = None
    if isinstance(data, dict):
        keys |= {str(k) for k in data}
        for key in ("start", "text"):
            if isinstance(data.get("data"), dict) and key in data["data"]:
                keys.add(f"data.{key}")
    if any(k.split(".")[0] in _REFINE_SECTIONS or k == "data.start" for k in keys):
        return "refine"
    if any(k.split(".")[0] in _SEGMENT_SECTIONS or k == "data.text" for k in keys):
        return "segment"
    return "train"


def load_run_config(path: str | Path, overrides: Sequence[str] = (), kind: str = "auto"):
    """(kind, checked config) of a train, refine or segment config file with overrides. `kind`
    "auto" asks `config_kind`. Raises ConfigError listing every problem, InputError for a file that
    cannot be read."""
    if kind == "auto":
        kind = config_kind(path, overrides)
    if kind == "train":
        from treewright.train import load_train_config
        return kind, load_train_config(path, overrides)
    if kind == "refine":
        from treewright.refine import load_refine_config
        return kind, load_refine_config(path, overrides)
    if kind == "segment":
        from treewright.adaptor.config import load_segment_config
        return kind, load_segment_config(path, overrides)
    raise InputError(f"a config kind is one of {', '.join(KINDS)}, not {kind!r}")


def is_segment_run(run_dir: str | Path) -> bool:
    """A run folder of `treewright segment`: its config.yaml is a segment config."""
    from treewright.runfolder import RunFolder

    config = RunFolder(run_dir).config
    return config.is_file() and config_kind(config) == "segment"
