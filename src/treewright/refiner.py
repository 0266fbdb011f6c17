"""Refinement as a library call: the split-merge refiner with the decoder that parses for it.

Refinement (`refine/`) knows nothing of decoding, like training; this layer, above both, hands
it `coarse_trees`, which parses with `decode.decode` on the fine grammar and projects the
labels to the coarse symbols. Entry points (the CLI and the demo call these):
- `refine(cfg, run_dir)` -> `RefineResult`; `refine_resume(run_dir)` continues an interrupted
  run. Both take `heldout_parser`, a parser of the caller's for held-out labeled F1.
`treewright.refine` names both, loaded from here on first use, because that is where a user
looks for them.
"""

from __future__ import annotations

from pathlib import Path
from typing import Sequence, TextIO

import torch

from treewright.decode import decode
from treewright.refine import run as core
from treewright.refine.config import RefineConfig
from treewright.refine.latent import LatentGrammar
from treewright.refine.text import project_labels
from treewright.trees import Tree


def coarse_trees(lg: LatentGrammar, words: Sequence[Sequence[str]],
                 decoder: str = "max-rule-product") -> list[Tree | None]:
    """Per sentence the best tree of the fine grammar of `lg` by `decoder` (a `decode.decode`
    name), its labels projected to the coarse symbols; None where a sentence has no parse."""
    fine = lg.to_grammar(torch.float64)
    return [None if r.tree is None else project_labels(r.tree)
            for r in decode(fine, words, decoder, tree_logprobs=False)]


def refine(cfg: RefineConfig, run_dir: str | Path, stream: TextIO | None = None,
           config_source: str | None = None,
           heldout_parser: core.HeldoutParser | None = None) -> core.RefineResult:
    """Run the refinement `cfg` describes into `run_dir` (see `refine.run.refine`)."""
    return core.refine(cfg, run_dir, stream, config_source, heldout_parser, parser=coarse_trees)


def refine_resume(run_dir: str | Path, stream: TextIO | None = None,
                  heldout_parser: core.HeldoutParser | None = None) -> core.RefineResult:
    """Continue the interrupted refinement in `run_dir` (see `refine.run.refine_resume`)."""
    return core.refine_resume(run_dir, stream, heldout_parser, parser=coarse_trees)
