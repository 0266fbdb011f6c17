"""Low-rank binary rules for grammars with many symbols.

Yang, Zhao & Tu 2021, "PCFGs Can Do Better: Inducing Probabilistic Context-Free Grammars with
Many Symbols" (TD-PCFG): the rule tensor is a sum of R rank-one terms,

    p(A -> B C) = sum_r U[A, r] V[B, r] W[C, r],

each row of U a distribution over r, each column of V and W a distribution over the S child
symbols, so that every p(A -> . .) sums to one. `engine.lowrank` runs the inside pass on the
factors in O(n^3 R) without ever forming the (NT, S, S) tensor.

The factors are computed from embeddings, in the spirit of the paper's neural parameterization
(the exact networks here are this project's): a parent network of each nonterminal's embedding,
a left and a right child network of every symbol's embedding, and an embedding per rank; U, V
and W are softmaxes of their dot products (U over r, V and W over symbols). The root and word
distributions are those of `params.neural` (Kim, Dyer & Rush 2019).
"""

from __future__ import annotations

from typing import NamedTuple

import torch
from torch import Tensor, nn

from treewright.engine.inside import SpanTables
from treewright.engine.lowrank import (lowrank_label_marginals, lowrank_log_partition,
                                      lowrank_span_tables)
from treewright.grammar import Grammar
from treewright.params.neural import EmbeddingParams, mlp
from treewright.params.tabular import RuleTensors, rules_to_grammar
from treewright.vocab import Vocabulary

DENSE_CHUNK = 16  # parents whose (S, S) rule tables are formed at once by `dense_binary`


class LowRankRules(NamedTuple):
    """Log-probabilities in factored form (the induction layout, as in `RuleTensors`)."""
    root: Tensor     # (NT,)
    u: Tensor        # (NT, R) log U, rows normalized over r
    v: Tensor        # (S, R)  log V, columns normalized over the child symbols
    w: Tensor        # (S, R)  log W
    lexical: Tensor  # (T, V)

    @property
    def binary(self) -> Tensor:
        """The (NT, S, S) log-probabilities the factors imply (memory NT * S^2)."""
        return dense_binary(self.u, self.v, self.w)

    def dense(self) -> RuleTensors:
        return RuleTensors(self.root, self.binary, self.lexical)

    def log_partition(self, terminal: Tensor, lengths: Tensor,
                      span_pot: Tensor | None = None) -> Tensor:
        """(B,) log Z for terminal scores (B, N, T), through the low-rank engine kernel."""
        return lowrank_log_partition(self.root, self.u, self.v, self.w, terminal, lengths,
                                     span_pot=span_pot)

    def label_marginals(self, terminal: Tensor, lengths: Tensor) -> tuple[Tensor, Tensor]:
        """(B,) log Z and (B, N+1, N+1, S) every symbol's posterior marginal over every span
        (`engine.lowrank.lowrank_label_marginals`; no (NT, S, S) tensor)."""
        return lowrank_label_marginals(self.root, self.u, self.v, self.w, terminal, lengths)

    def span_tables(self, terminal: Tensor, lengths: Tensor) -> SpanTables:
        """log Z, marginals, inside and outside scores of every symbol over every span
        (`engine.lowrank.lowrank_span_tables`; no (NT, S, S) tensor)."""
        return lowrank_span_tables(self.root, self.u, self.v, self.w, terminal, lengths)

    def binary_logprob(self, a: Tensor, b: Tensor, c: Tensor) -> Tensor:
        """log p(a -> b c) for index tensors of one shape (children indexed over S)."""
        return torch.logsumexp(self.u[a] + self.v[b] + self.w[c], -1)


def dense_binary(u: Tensor, v: Tensor, w: Tensor) -> Tensor:
    """log sum_r U[A, r] V[B, r] W[C, r] as an (NT, S, S) tensor, a few parents at a time.

    Each factor is shifted by its maximum before the exp, so the products stay in range; the
    shifts are added back in log space."""
    nt, r = u.shape
    s = v.shape[0]
    cv, cw = v.amax(0, keepdim=True), w.amax(0, keepdim=True)          # per-rank shifts (1, R)
    ev, ew = (v - cv).exp(), (w - cw).exp()                             # (S, R)
    shifted = u + cv + cw                                               # (NT, R)
    cu = shifted.amax(1, keepdim=True)                                  # (NT, 1)
    eu = (shifted - cu).exp()
    out = u.new_empty(nt, s, s)
    for a0 in range(0, nt, DENSE_CHUNK):
        a1 = min(nt, a0 + DENSE_CHUNK)
        # (a, S, R) * (R, S) -> (a, S, S)
        out[a0:a1] = torch.matmul(ev[None] * eu[a0:a1, None, :], ew.t()).log_()
    return out + cu[:, :, None]


class LowRankParams(EmbeddingParams):
    """Neural low-rank PCFG: U, V, W, root and words from embeddings.

    nonterminals, preterminals, vocab_size: NT, T, V.
    rank: R, the number of rank-one terms (Yang et al. 2021 use hundreds to thousands, with
        NT and T in the hundreds).
    dim, blocks: embedding/hidden size and residual blocks of the networks (as in
        `NeuralParams`).
    """

    def __init__(self, nonterminals: int, preterminals: int, vocab_size: int, rank: int,
                 dim: int = 256, blocks: int = 2, generator: torch.Generator | None = None,
                 dtype: torch.dtype = torch.float32):
        super().__init__()
        s = nonterminals + preterminals
        self.nonterminals, self.preterminals, self.vocab_size = nonterminals, preterminals, \
            vocab_size
        self.rank = rank
        self.start_embedding = nn.Parameter(torch.empty(1, dim))
        self.symbol_embeddings = nn.Parameter(torch.empty(s, dim))      # nonterminals first
        self.rank_embeddings = nn.Parameter(torch.empty(rank, dim))
        self.root_net = mlp(dim, blocks, nonterminals)
        self.parent_net = mlp(dim, 1, dim)
        self.left_net = mlp(dim, 1, dim)
        self.right_net = mlp(dim, 1, dim)
        self.lexical_net = mlp(dim, blocks, vocab_size)
        self.to(dtype)
        self._initialise(generator)

    @classmethod
    def from_options(cls, options, vocab_size: int, generator: torch.Generator | None,
                     dtype: torch.dtype) -> "LowRankParams":
        return cls(options.nonterminals, options.preterminals, vocab_size, options.rank,
                   options.embedding_dim, options.residual_blocks, generator, dtype)

    @staticmethod
    def memory_shape(options) -> dict:
        """The inside-outside memory estimate's arguments (`engine.memory`): factored rules."""
        return {"rank": options.rank}

    def rules(self) -> LowRankRules:
        nt = self.nonterminals
        emb = self.symbol_embeddings
        ranks = self.rank_embeddings                                            # (R, d)
        root = torch.log_softmax(self.root_net(self.start_embedding)[0], 0)     # (NT,)
        u = torch.log_softmax(self.parent_net(emb[:nt]) @ ranks.t(), 1)         # (NT, R)
        v = torch.log_softmax(self.left_net(emb) @ ranks.t(), 0)                # (S, R)
        w = torch.log_softmax(self.right_net(emb) @ ranks.t(), 0)
        lexical = torch.log_softmax(self.lexical_net(emb[nt:]), 1)              # (T, V)
        return LowRankRules(root, u, v, w, lexical)

    def to_grammar(self, nonterminals: list[str], preterminals: list[str], vocab: Vocabulary,
                   start: str = "ROOT") -> Grammar:
        with torch.no_grad():
            return rules_to_grammar(self.rules().dense(), nonterminals, preterminals, vocab,
                                    start)
