"""Split-merge refinement of a PCFG with latent subcategories (Petrov, Barrett, Thibaux & Klein
2006, "Learning Accurate, Compact, and Interpretable Tree Annotation"; latent annotations after
Matsuzaki, Miyao & Tsujii 2005).

Two starting points share one refiner: a treebank (the coarse grammar by count ratios, then EM
on the observed trees, `tree_cycle`) and raw text (an induced grammar, then inside-outside over
sentences, `text_cycle`). `refine(cfg, run_dir)` runs either from a config.

Refinement imports neither decoding nor evaluation: where it parses (held-out F1, the text
start's merge step) the caller hands in a parser. `refine` and `refine_resume`, the library
entry points, live in `treewright.refiner`, which supplies the usual parser; they are named
here, loaded on first use, because this is where a user looks for them.
"""

from treewright.refine.config import RefineConfig, load_refine_config
from treewright.grammar import coarse_name, fine_name
from treewright.refine.latent import LatentGrammar, latent_from_grammar, normalize
from treewright.refine.run import (CoarseParser, CycleSettings, HeldoutParser, RefineResult,
                                   cnf_tree, em_on_text, em_on_trees, estimate_coarse,
                                   labeled_f1, map_words, text_cycle, tree_cycle)
from treewright.refine.signatures import UNKNOWN, WordClasses, signature
from treewright.refine.splitmerge import merge, merge_losses, merge_plan, smooth, split
from treewright.refine.summary import subcategory_summary, summary_text
from treewright.refine.text import text_estep, text_loglik
from treewright.refine.trees import TreeEStep, TreeSet, tree_estep, tree_inside, tree_loglik, \
    tree_set

__all__ = [
    "CoarseParser", "CycleSettings", "HeldoutParser", "LatentGrammar", "RefineConfig", "RefineResult", "TreeEStep", "TreeSet",
    "UNKNOWN", "WordClasses", "cnf_tree", "coarse_name", "em_on_text", "em_on_trees",
    "estimate_coarse", "fine_name", "labeled_f1", "latent_from_grammar", "load_refine_config",
    "map_words", "merge", "merge_losses", "merge_plan", "normalize", "refine", "refine_resume",
    "signature",
    "smooth", "split", "subcategory_summary", "summary_text", "text_cycle", "text_estep",
    "text_loglik", "tree_cycle", "tree_estep", "tree_inside", "tree_loglik", "tree_set",
]


def __getattr__(name: str):
    if name in ("refine", "refine_resume"):
        from treewright import refiner
        return getattr(refiner, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
