"""The typed schema of a refinement run (`treewright refine CONFIG.yaml`).

Where the defaults come from: the cycle structure, the 1% perturbation, merging back half of the
splits and the smoothing weights (0.01 for nonterminals, 0.1 for preterminals) follow Petrov,
Barrett, Thibaux & Klein 2006 as we remember it (from memory, not checked against the paper).
The EM iteration count after a split is ours, measured on the recovery check in
tests/test_refine.py: with a 1% perturbation the two halves of a split drift apart slowly (the
difference grows geometrically from 1%), and 20 iterations closed 23% of the gap to the true
fine grammar while 50 closed 88% (as many as 100 add nothing there). Petrov et al. also ran
about 50 (from memory).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Literal, Sequence

from treewright.config import ConfigError, ConfigProblem, load_config, option


@dataclass
class RefineDataConfig:
    train: Path = option(doc="Training corpus: bracketed trees or CoNLL-U (treebank), raw "
                             "text (text).")
    start: Literal["treebank", "text"] = option(
        "treebank", "treebank: estimate the coarse grammar from trees by count ratios and run "
                    "EM on the given trees; text: refine `grammar` by inside-outside over raw "
                    "sentences (tree and subcategories both latent).")
    dev: Path | None = option(None, "Held-out corpus; null holds out `heldout_fraction` of the "
                                    "training file instead.")
    heldout_fraction: float = option(0.1, "Share of the training file held out when `dev` is "
                                          "null (seeded by refine.seed).", range="(0, 1)")
    format: Literal["auto", "text", "brackets", "conllu"] = option(
        "auto", "Corpus format of both files; auto looks at the first lines.")
    grammar: Path | None = option(None, "text start: the induced grammar to refine (grammar "
                                        "text format).")
    max_length: int | None = option(40, "Sentences longer than this are set aside (counted).",
                                    range="[1, inf)")
    rare_count: int = option(1, "treebank: training words seen at most this often stand for "
                                "their shape class, such as ⟪Capital·…ek⟫ (unknown-word "
                                "handling; see refine/signatures.py).",
                             range="[0, inf)")
    signature_min_count: int = option(3, "treebank: a shape class needs this many rare "
                                         "tokens to be a class; rarer shapes share <unk>.",
                                      range="[1, inf)")


@dataclass
class TreeFormConfig:
    factor: Literal["right", "left"] = option("right", "Binarization direction.")
    horizontal: int | None = option(1, "Horizontal markovization order (null: all siblings). "
                                       "Small orders keep the coarse grammar small; the "
                                       "subcategories learn the rest.", range="[0, inf)")
    vertical: int = option(1, "Vertical markovization order (1: no parent annotation).",
                           range="[1, inf)")


@dataclass
class CycleConfig:
    cycles: int = option(2, "Split-merge cycles; each at most doubles every symbol's "
                            "subcategories.", range="[0, inf)")
    em_iterations: int = option(50, "EM iterations after each split: the 1% perturbation needs "
                                    "a few dozen to grow into distinct subcategories (see the "
                                    "module docstring).", range="[1, inf)")
    smoothed_iterations: int = option(5, "EM iterations after each merge, each M-step followed "
                                         "by smoothing (step 4).", range="[0, inf)")
    merge_fraction: float = option(0.5, "Share of the new splits merged back, those whose "
                                         "merge loses the least likelihood.", range="[0, 1]")
    perturbation: float = option(0.01, "Relative noise added to split rule probabilities to "
                                       "break symmetry.", range="[0, 1)")
    smooth_nonterminal: float = option(0.01, "Smoothing weight toward the siblings' mean for "
                                             "symbols with binary rules.", range="[0, 1]")
    smooth_preterminal: float = option(0.1, "Smoothing weight for symbols with word rules "
                                            "only.", range="[0, 1]")
    seed: int = option(0, "Seeds the perturbation and the held-out split.")
    batch_size: int = option(32, "text start: sentences per inside-outside batch.",
                             range="[1, inf)")


@dataclass
class RefineOutputConfig:
    run_dir: Path | None = option(None, "Run folder; null uses runs/<config file name>.")
    tensorboard: bool = option(True, "Write TensorBoard event files.")
    stdout_metrics: bool = option(True, "Print each cycle's metrics on standard output.")
    parse_f1: bool = option(True, "treebank: parse the held-out sentences after each cycle "
                                  "(coarse max-rule-product decoder) for labeled F1.")
    f1_max_sentences: int | None = option(
        None, "Parse at most this many held-out sentences (the first ones); null: every one "
              "(batched: on the Turkish web section, all 242 held-out sentences cost about 1 s "
              "over a 13 s run of two cycles).", range="[1, inf)")
    f1_decoder: Literal["max-rule-product", "viterbi"] = option(
        "max-rule-product", "Decoder for held-out F1: the coarse max-rule-product decoder, or "
                            "the best fine tree with its labels projected to coarse ones.")
    summary_top: int = option(5, "Words or rules listed per subcategory in the summary.",
                              range="[1, inf)")


@dataclass
class RefineConfig:
    data: RefineDataConfig = option(doc="Corpora and the starting point.")
    tree_form: TreeFormConfig = option(TreeFormConfig(), "treebank: how trees become CNF.")
    refine: CycleConfig = option(CycleConfig(), "The split-merge cycles.")
    output: RefineOutputConfig = option(RefineOutputConfig(), "Run folder and logging.")


def load_refine_config(path: str | Path | None, overrides: Sequence[str] = ()) -> RefineConfig:
    """The checked config (ConfigError lists every problem at once)."""
    cfg = load_config(RefineConfig, path, overrides, resolve_paths=True)
    source = None if path is None else str(path)
    problems = []
    if cfg.data.start == "text" and cfg.data.grammar is None:
        problems.append(ConfigProblem("data.grammar", "the text start refines a grammar; give "
                                                      "its file", source))
    if cfg.data.start == "treebank" and cfg.data.grammar is not None:
        problems.append(ConfigProblem("data.grammar", "the treebank start estimates its own "
                                                      "coarse grammar; leave this null", source))
    if problems:
        raise ConfigError(problems, path=source)
    return cfg
