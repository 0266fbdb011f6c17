"""Adaptor grammars: Pitman-Yor caches of whole subtrees over a PCFG base (Johnson, Griffiths &
Goldwater 2007, "Adaptor Grammars: A Framework for Specifying Compositional Nonparametric
Bayesian Models").

`model` holds the restaurants, `proposal` the PCFG approximation a sentence's new tree is drawn
from, `sampler` the sentence-blocked Metropolis-Hastings chains and their checkpoint.
"""

from treewright.adaptor.model import Cache, Rules, tree_yield
from treewright.adaptor.sampler import AdaptorSampler, Chain

__all__ = ["AdaptorSampler", "Cache", "Chain", "Rules", "tree_yield"]
