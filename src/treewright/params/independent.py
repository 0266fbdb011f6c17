"""Independent left and right productions, for grammars with thousands of symbols.

Liu, Yang, Kim & Tu 2023, "Simple Hardware-Efficient PCFGs with Independent Left and Right
Productions". The binary rule distribution of each nonterminal A is the outer product of two
distributions over the S = NT + T child symbols, one for the left child and one for the right:

    p(A -> B C) = p(B | A, left) * p(C | A, right),

so p(A -> . .) sums to one because each factor does, and the rule tensor has NT * 2S free
entries instead of NT * S^2. The paper pairs this form with neural networks over symbol
embeddings and reports its best results at thousands of symbols; that is from memory of the
paper, and so is the form above as its definition (we state it as we implement it). This module
holds two forms: `IndependentParams`, one logit per (parent, side, child), the root and the
words one logit per rule as in `params.tabular`; and `NeuralIndependentParams`, the same
factors computed from symbol embeddings with the networks of `params.neural` (Kim, Dyer & Rush
2019), the binary network split into one linear map per side. The paper's own networks are not
copied (we do not have them at hand); this is the neural PCFG's design carried over to the
factored rules. `engine.independent` runs the inside pass on the two factors without forming
the (NT, S, S) tensor.

The tabular form trains by gradient or by EM (`em`, `map_em`): the expected counts of the two
factors are the gradient of log Z with respect to their log-probabilities
(`train.estep.independent_counts`), and the M-step normalizes each factor's counts on its own
(`train.updates`). The neural form trains by gradient only.
"""

from __future__ import annotations

from typing import NamedTuple

import torch
from torch import Tensor, nn

from treewright.engine.independent import independent_dense_binary, independent_log_partition
from treewright.engine.inside import SpanTables
from treewright.engine.lowrank import lowrank_label_marginals, lowrank_span_tables
from treewright.grammar import Grammar
from treewright.params.base import RuleModel
from treewright.params.neural import EmbeddingParams, mlp
from treewright.params.tabular import RuleTensors, rules_to_grammar
from treewright.vocab import Vocabulary

PARENT_CHUNK = 64  # parents whose candidate rules `most_probable` ranks at once


class IndependentRules(NamedTuple):
    """Log-probabilities in factored form (the induction layout, as in `RuleTensors`)."""
    root: Tensor     # (NT,)
    left: Tensor     # (NT, S) log p(B | A, left), rows normalized over the child symbols
    right: Tensor    # (NT, S) log p(C | A, right)
    lexical: Tensor  # (T, V)

    @property
    def binary(self) -> Tensor:
        """The (NT, S, S) log-probabilities the factors imply (memory NT * S^2)."""
        return independent_dense_binary(self.left, self.right)

    @property
    def binary_rules(self) -> int:
        """NT * S^2, the number of binary rules the factors imply (without forming them)."""
        nt, s = self.left.shape
        return nt * s * s

    def dense(self) -> RuleTensors:
        return RuleTensors(self.root, self.binary, self.lexical)

    def log_partition(self, terminal: Tensor, lengths: Tensor,
                      span_pot: Tensor | None = None) -> Tensor:
        """(B,) log Z for terminal scores (B, N, T), through the independent engine kernel."""
        return independent_log_partition(self.root, self.left, self.right, terminal, lengths,
                                         span_pot=span_pot)

    def label_marginals(self, terminal: Tensor, lengths: Tensor) -> tuple[Tensor, Tensor]:
        """(B,) log Z and (B, N+1, N+1, S) every symbol's posterior marginal over every span
        (`engine.lowrank.lowrank_label_marginals`; no (NT, S, S) tensor)."""
        return lowrank_label_marginals(self.root, None, self.left.t(), self.right.t(), terminal,
                                       lengths)

    def span_tables(self, terminal: Tensor, lengths: Tensor) -> SpanTables:
        """log Z, marginals, inside and outside scores of every symbol over every span
        (`engine.lowrank.lowrank_span_tables`; no (NT, S, S) tensor)."""
        return lowrank_span_tables(self.root, None, self.left.t(), self.right.t(), terminal,
                                   lengths)

    def binary_logprob(self, a: Tensor, b: Tensor, c: Tensor) -> Tensor:
        """log p(a -> b c) for index tensors of one shape (children indexed over S)."""
        return self.left[a, b] + self.right[a, c]

    def most_probable(self, per_symbol: int) -> tuple[RuleTensors, Tensor]:
        """Dense rules keeping only each nonterminal's `per_symbol` most probable binary rules
        (the rest -inf; renormalising is left to `rules_to_grammar`), and the probability mass
        (NT,) float64 left out (`most_probable_pairs`)."""
        b, c, values, removed = self.most_probable_pairs(per_symbol)
        nt, s = self.left.shape
        binary = self.left.detach().new_full((nt, s, s), float("-inf"))
        binary[torch.arange(nt)[:, None].expand_as(b), b, c] = values
        return RuleTensors(self.root, binary, self.lexical), removed

    def most_probable_pairs(self, per_symbol: int) -> tuple[Tensor, Tensor, Tensor, Tensor]:
        """Each nonterminal's `per_symbol` most probable binary rules, found without ranking all
        S^2 rules of a parent or forming the (NT, S, S) tensor: left and right child ids and
        log-probabilities, (NT, k) each, k = min(per_symbol, S^2), most probable first; and the
        probability mass (NT,) float64 they leave out.

        The rule at rank positions (i, j) of the sorted left and right factors is no more
        probable than the (i+1)(j+1) rules at positions (i', j') <= (i, j), so only pairs with
        (i+1)(j+1) <= per_symbol can be among the top per_symbol."""
        left, right = self.left.detach(), self.right.detach()
        nt, s = left.shape
        k = min(per_symbol, s * s)
        pairs = [(i, j) for i in range(min(s, k)) for j in range(min(s, k // (i + 1)))]
        rank_i = torch.tensor([i for i, _ in pairs])
        rank_j = torch.tensor([j for _, j in pairs])
        b_all = torch.empty(nt, k, dtype=torch.long)
        c_all = torch.empty(nt, k, dtype=torch.long)
        values = left.new_empty(nt, k)
        removed = torch.empty(nt, dtype=torch.float64)
        for a0 in range(0, nt, PARENT_CHUNK):
            a1 = min(nt, a0 + PARENT_CHUNK)
            sl, il = left[a0:a1].sort(1, descending=True)              # (a, S)
            sr, ir = right[a0:a1].sort(1, descending=True)
            candidates = sl[:, rank_i] + sr[:, rank_j]                 # (a, M)
            top = candidates.topk(k, 1)                                # (a, k)
            b_all[a0:a1] = il.gather(1, rank_i[top.indices])           # left child ids (a, k)
            c_all[a0:a1] = ir.gather(1, rank_j[top.indices])
            values[a0:a1] = top.values
            total = left[a0:a1].double().logsumexp(1) + right[a0:a1].double().logsumexp(1)
            kept = top.values.double().logsumexp(1)
            removed[a0:a1] = (total.exp() - kept.exp()).clamp(min=0.0)
        return b_all, c_all, values, removed


class IndependentParams(RuleModel):
    """Tabular independent left and right productions: one logit per (parent, side, child).

    nonterminals, preterminals, vocab_size: NT, T, V.
    init_scale: standard deviation of the normal logits at random initialisation (default 1.0;
        0 gives the uniform grammar).
    generator: the seeded source of that randomness.
    dtype: of the logits (float64 for exactness tests).
    """

    def __init__(self, nonterminals: int, preterminals: int, vocab_size: int,
                 init_scale: float = 1.0, generator: torch.Generator | None = None,
                 dtype: torch.dtype = torch.float32):
        super().__init__()
        s = nonterminals + preterminals

        def draw(*shape: int) -> Tensor:
            return (torch.randn(*shape, generator=generator, dtype=torch.float64)
                    * init_scale).to(dtype)

        self.nonterminals, self.preterminals = nonterminals, preterminals
        self.root_logits = nn.Parameter(draw(nonterminals))                 # (NT,)
        self.left_logits = nn.Parameter(draw(nonterminals, s))               # (NT, S)
        self.right_logits = nn.Parameter(draw(nonterminals, s))              # (NT, S)
        self.lexical_logits = nn.Parameter(draw(preterminals, vocab_size))   # (T, V)

    @classmethod
    def from_options(cls, options, vocab_size: int, generator: torch.Generator | None,
                     dtype: torch.dtype) -> "IndependentParams":
        return cls(options.nonterminals, options.preterminals, vocab_size, options.init_scale,
                   generator, dtype)

    @staticmethod
    def memory_shape(options) -> dict:
        """The inside-outside memory estimate's arguments (`engine.memory`): the chart holds
        NT-long projections of each cell, as the low-rank pass's of rank NT."""
        return {"rank": options.nonterminals}

    @torch.no_grad()
    def set_log_probs(self, rules: IndependentRules) -> None:
        """Store normalized log-probabilities (the M-step of EM) as the logits."""
        self.root_logits.copy_(rules.root)
        self.left_logits.copy_(rules.left)
        self.right_logits.copy_(rules.right)
        self.lexical_logits.copy_(rules.lexical)

    def rules(self) -> IndependentRules:
        return IndependentRules(torch.log_softmax(self.root_logits, 0),
                                torch.log_softmax(self.left_logits, 1),
                                torch.log_softmax(self.right_logits, 1),
                                torch.log_softmax(self.lexical_logits, 1))

    def to_grammar(self, nonterminals: list[str], preterminals: list[str], vocab: Vocabulary,
                   start: str = "ROOT") -> Grammar:
        with torch.no_grad():
            return rules_to_grammar(self.rules().dense(), nonterminals, preterminals, vocab,
                                    start)


class NeuralIndependentParams(EmbeddingParams):
    """Independent left and right productions computed from symbol embeddings: the root is a
    residual network of a start embedding, each side's child distribution a linear map of the
    parent's embedding to scores over the S children, and each preterminal's words a residual
    network of its embedding, as in `params.neural.NeuralParams` but with the (S * S)-wide
    binary map replaced by two S-wide ones, so that the parameters grow as NT * S, not
    NT * S^2.

    nonterminals, preterminals, vocab_size: NT, T, V.
    dim: embedding and hidden size; blocks: residual blocks in the root and word networks.
    generator: seeds the initialisation (`EmbeddingParams._initialise`).
    """

    def __init__(self, nonterminals: int, preterminals: int, vocab_size: int, dim: int = 256,
                 blocks: int = 2, generator: torch.Generator | None = None,
                 dtype: torch.dtype = torch.float32):
        super().__init__()
        s = nonterminals + preterminals
        self.nonterminals, self.preterminals, self.vocab_size = nonterminals, preterminals, \
            vocab_size
        self.start_embedding = nn.Parameter(torch.empty(1, dim))                    # (1, d)
        self.nonterminal_embeddings = nn.Parameter(torch.empty(nonterminals, dim))  # (NT, d)
        self.preterminal_embeddings = nn.Parameter(torch.empty(preterminals, dim))  # (T, d)
        self.root_net = mlp(dim, blocks, nonterminals)
        self.left_net = nn.Linear(dim, s)
        self.right_net = nn.Linear(dim, s)
        self.lexical_net = mlp(dim, blocks, vocab_size)
        self.to(dtype)
        self._initialise(generator)

    @classmethod
    def from_options(cls, options, vocab_size: int, generator: torch.Generator | None,
                     dtype: torch.dtype) -> "NeuralIndependentParams":
        return cls(options.nonterminals, options.preterminals, vocab_size, options.embedding_dim,
                   options.residual_blocks, generator, dtype)

    memory_shape = staticmethod(IndependentParams.memory_shape)

    def rules(self) -> IndependentRules:
        parents = self.nonterminal_embeddings
        return IndependentRules(
            torch.log_softmax(self.root_net(self.start_embedding)[0], 0),            # (NT,)
            torch.log_softmax(self.left_net(parents), 1),                          # (NT, S)
            torch.log_softmax(self.right_net(parents), 1),                         # (NT, S)
            torch.log_softmax(self.lexical_net(self.preterminal_embeddings), 1))   # (T, V)

    to_grammar = IndependentParams.to_grammar
