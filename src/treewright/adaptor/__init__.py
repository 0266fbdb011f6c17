"""Adaptor grammars: Pitman-Yor caches of whole subtrees over a PCFG base (Johnson, Griffiths &
Goldwater 2007, "Adaptor Grammars: A Framework for Specifying Compositional Nonparametric
Bayesian Models").

`model` holds the restaurants, `proposal` the PCFG approximation a sentence's new tree is drawn
from, `sampler` the sentence-blocked Metropolis-Hastings chains (with annealing) and their
checkpoint, `hyper` the slice sampling of discounts and concentrations, `segment` character
input, segmentations and the induced lexicon, `config` and `run` the `treewright segment`
job.
"""

from treewright.adaptor.model import Cache, Rules, tree_yield
from treewright.adaptor.sampler import AdaptorSampler, Chain, annealing
from treewright.adaptor.segment import (Utterances, characters, parse_utterances,
                                        read_utterances, segment, top_spans)

__all__ = ["AdaptorSampler", "Cache", "Chain", "Rules", "Utterances", "annealing", "characters",
           "parse_utterances", "read_utterances", "segment", "top_spans", "tree_yield"]
