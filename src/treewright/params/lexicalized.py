"""The neural bilexicalized PCFG of Yang, Zhao & Tu 2021, "Neural Bi-Lexicalized PCFG
Induction" (NAACL), run through `engine.lexicalized` (whose docstring gives the grammar and the
decomposition of the binary rules through a latent class H).

The factors, each a softmax of dot products between a network of what is conditioned on and
the embeddings of the outcomes (symbols, words and latent classes each have an embedding; the
exact networks are this project's):

    p(S -> A[x])        = p(A | S) p(x | A)       root symbol, then its head word
    p(H | A, x)         = lambda_A p_word(H | A, x) + (1 - lambda_A) p_sym(H | A)
    p(B, side | H), p(C | H), p(x' | H)            head child, dependent child, dependent word

The back-off is the mixture in the second line. p_word reads the head word's embedding; p_sym is
the same parent's rule with no word at all, and lambda_A = sigmoid(a_A), one learned weight per
nonterminal, says how much A's rules trust the word. `backoff_weights()` returns the lambdas,
`symbol_rules()` the symbol-only grammar, and `strongest_word_pairs` / `strongest_head_symbols`
what a trained model learned about words.

A preterminal's word costs nothing more once drawn (as in the paper). A one-word sentence has no
nonterminal, so its root is a preterminal, with p(T | S) a separate distribution over T.

Vocabulary size: word tables are (symbols or classes) x V; the word-word interaction exists only
for the words of a sentence, through H (B, N, NT, R), never as a V x V matrix.

`rules()` is the back-off grammar as an ordinary PCFG (`RuleTensors`): root p(A | S), binary
rules of p_sym with the sides summed, and p(x | T) proportional to sum_H rho(H) p(T | H)
p(x | H), rho the symbol-only class distribution averaged over parents. It is what training
writes as the grammar file; scores and decoding use the lexicalized model itself.
"""

from __future__ import annotations

import math

import torch
import torch.nn.functional as F
from torch import Tensor, nn

from treewright.engine.lexicalized import (LexicalizedFactors, LexicalizedParse,
                                           lexicalized_log_partition, lexicalized_viterbi)
from treewright.grammar import Grammar
from treewright.params.neural import EmbeddingParams, ResidualBlock, mlp
from treewright.params.tabular import RuleTensors, rules_to_grammar
from treewright.vocab import Vocabulary

PAIR_CHUNK = 256  # head words whose dependent distributions are formed at once (chunk x V)


class LexicalizedParams(EmbeddingParams):
    """Neural bilexicalized PCFG.

    nonterminals, preterminals, vocab_size: NT, T, V.
    classes: R, the latent classes between a head word and its dependent.
    dim, blocks: embedding/hidden size and residual blocks of the networks.
    """

    parses_one_word = True   # its root may be a preterminal (see the module docstring)

    def __init__(self, nonterminals: int, preterminals: int, vocab_size: int, classes: int,
                 dim: int = 64, blocks: int = 1, generator: torch.Generator | None = None,
                 dtype: torch.dtype = torch.float32):
        super().__init__()
        s = nonterminals + preterminals
        self.nonterminals, self.preterminals, self.vocab_size = nonterminals, preterminals, \
            vocab_size
        self.classes = classes
        self.start_embedding = nn.Parameter(torch.empty(1, dim))             # (1, d)
        self.symbol_embeddings = nn.Parameter(torch.empty(s, dim))           # (S, d)
        self.word_embeddings = nn.Parameter(torch.empty(vocab_size, dim))    # (V, d)
        self.class_embeddings = nn.Parameter(torch.empty(classes, dim))      # (R, d)
        self.side_embeddings = nn.Parameter(torch.empty(2, dim))             # (2, d) left, right
        self.backoff_logits = nn.Parameter(torch.empty(nonterminals))        # (NT,) a_A
        self.root_net = mlp(dim, blocks, s)
        self.root_word_net = mlp(dim, blocks, dim)
        self.parent_net = mlp(dim, blocks, dim)          # p_sym(H | A)
        self.parent_word_net = nn.Linear(dim, dim)       # p_word(H | A, x): the parent's part
        self.head_word_net = nn.Linear(dim, dim)         # ... and the head word's part
        self.parent_word_block = ResidualBlock(dim)
        self.head_child_net = mlp(dim, blocks, dim)
        self.dep_child_net = mlp(dim, blocks, dim)
        self.dep_word_net = mlp(dim, blocks, dim)
        self.to(dtype)
        self._initialise(generator)   # zero backoff logits: lambda = 1/2 at the start

    @classmethod
    def from_options(cls, options, vocab_size: int, generator: torch.Generator | None,
                     dtype: torch.dtype) -> "LexicalizedParams":
        return cls(options.nonterminals, options.preterminals, vocab_size, options.head_classes,
                   options.embedding_dim, options.residual_blocks, generator, dtype)

    # The factors that do not depend on the sentence.

    def root_symbols(self) -> Tensor:
        """(S,) log p(A | S): over nonterminals, and separately over preterminals (the root of a
        one-word sentence)."""
        logits = self.root_net(self.start_embedding)[0]                       # (S,)
        nt = self.nonterminals
        return torch.cat([torch.log_softmax(logits[:nt], 0), torch.log_softmax(logits[nt:], 0)])

    def root_words(self) -> Tensor:
        """(S, V) log p(x | A), the root's head word."""
        return torch.log_softmax(self.root_word_net(self.symbol_embeddings)
                                 @ self.word_embeddings.t(), -1)

    @torch.no_grad()
    def backoff_weights(self) -> Tensor:
        """(NT,) lambda_A: the weight of the word-conditioned class distribution in A's rules
        (1 - lambda_A goes to the symbol-only back-off); for inspection, without gradient."""
        return torch.sigmoid(self.backoff_logits)

    def symbol_classes(self) -> Tensor:
        """(NT, R) log p_sym(H | A), the back-off: A's class distribution with no word."""
        emb = self.symbol_embeddings[:self.nonterminals]
        return torch.log_softmax(self.parent_net(emb) @ self.class_embeddings.t(), -1)

    def word_classes(self, words: Tensor) -> Tensor:
        """(..., NT, R) log p_word(H | A, x) for head-word embeddings `words` (..., d)."""
        parent = self.parent_word_net(self.symbol_embeddings[:self.nonterminals])     # (NT, d)
        hidden = self.parent_word_block(parent + self.head_word_net(words).unsqueeze(-2))
        return torch.log_softmax(hidden @ self.class_embeddings.t(), -1)      # (..., NT, R)

    def head_classes(self, words: Tensor) -> Tensor:
        """(..., NT, R) log p(H | A, x): the word-conditioned distribution mixed with the
        symbol-only back-off by lambda_A."""
        lam = self.backoff_logits[:, None]                                     # (NT, 1)
        return torch.logaddexp(F.logsigmoid(lam) + self.word_classes(words),
                               F.logsigmoid(-lam) + self.symbol_classes())

    def head_children(self) -> Tensor:
        """(R, 2, S) log p(B, side | H), one distribution over (side, symbol) pairs."""
        sym, side = self.symbol_embeddings, self.side_embeddings
        outcomes = (side[:, None, :] + sym[None, :, :]).reshape(-1, sym.shape[1])    # (2S, d)
        logits = self.head_child_net(self.class_embeddings) @ outcomes.t()            # (R, 2S)
        return torch.log_softmax(logits, -1).view(self.classes, 2, -1)

    def dependent_children(self) -> Tensor:
        """(R, S) log p(C | H)."""
        return torch.log_softmax(self.dep_child_net(self.class_embeddings)
                                 @ self.symbol_embeddings.t(), -1)

    def dependent_words(self) -> Tensor:
        """(R, V) log p(x' | H)."""
        return torch.log_softmax(self.dep_word_net(self.class_embeddings)
                                 @ self.word_embeddings.t(), -1)

    # Per sentence.

    def factors(self, ids: Tensor, lengths: Tensor) -> LexicalizedFactors:
        """The engine's factors for word ids (B, N) (-1: a word outside the vocabulary, which
        no rule generates, so its sentence has no parse; positions past `lengths` ignored)."""
        known = ids >= 0
        safe = ids.clamp(min=0)                                                # (B, N)
        root = self.root_symbols() + self.root_words()[:, safe].permute(1, 2, 0)   # (B, N, S)
        dep_word = self.dependent_words()[:, safe].permute(1, 2, 0)           # (B, N, R)
        if not bool(known.all()):
            root = root.masked_fill(~known[..., None], float("-inf"))
            dep_word = dep_word.masked_fill(~known[..., None], float("-inf"))
        head = self.head_classes(self.word_embeddings[safe])                   # (B, N, NT, R)
        return LexicalizedFactors(root, head, self.head_children(), self.dependent_children(),
                                  dep_word)

    def log_partition(self, ids: Tensor, lengths: Tensor, span_pot: Tensor | None = None,
                      generator: torch.Generator | None = None, beta: float = 1.0,
                      head_bias: Tensor | None = None,
                      arc_length: float = 0.0) -> tuple[Tensor, None]:
        """(B,) log p(x_b) under the lexicalized model, with gradient; no KL term. With
        beta < 1, (1/beta) log sum_d p(d)^beta instead, whose gradient is the expected gradient
        of log p(d) under the annealed posterior (`LexicalizedFactors.tempered`). `head_bias`
        (B, N) adds, for every binary node, the log-weight of its head word's position: a
        binary node is where its head word takes one dependent, so a derivation gains the
        bias of each word times the number of its dependents (`bias.head_list`).
        `arc_length` adds its log-weight for every word between a dependent and its head
        (`bias.arc_length`; `engine.lexicalized.lexicalized_log_partition`)."""
        factors = self.factors(ids, lengths)
        if head_bias is not None:
            factors = factors._replace(head=factors.head + head_bias[:, :, None, None])
        factors = factors.tempered(beta)
        return lexicalized_log_partition(factors, lengths, span_pot=span_pot,
                                         arc_length=arc_length * beta) / beta, None

    def scorer(self, rules=None) -> "LexicalizedScorer":
        """Dev scores of the lexicalized model (`rules`, the back-off grammar, unused)."""
        return LexicalizedScorer(self)

    def parse(self, ids: Tensor, lengths: Tensor, span_pot: Tensor | None = None
              ) -> list[LexicalizedParse]:
        """The best derivation of each sentence: constituents with their head words, and the
        head of every word (engine.lexicalized.lexicalized_viterbi), among the trees the
        span potentials (B, N+1, N+1), when given, allow."""
        with torch.no_grad():
            factors = self.factors(ids, lengths)
        return lexicalized_viterbi(factors, lengths, span_pot)

    # The back-off grammar as an ordinary PCFG.

    def class_prior(self) -> Tensor:
        """(R,) rho(H) = the mean over nonterminals of p_sym(H | A), in log space."""
        sym = self.symbol_classes()
        return torch.logsumexp(sym, 0) - math.log(sym.shape[0])

    def symbol_rules(self) -> Tensor:
        """(NT, S, S) log p_sym(A -> B C): the back-off's binary rules, sides summed:
        sum_H p_sym(H | A) [p(B, left | H) p(C | H) + p(B | H) p(C, right | H)]."""
        sym, hc, dc = self.symbol_classes(), self.head_children(), self.dependent_children()
        left = hc[:, 0, :, None] + dc[:, None, :]                             # (R, S, S)
        right = dc[:, :, None] + hc[:, 1, None, :]
        per_class = torch.logaddexp(left, right)                              # (R, S, S)
        return torch.logsumexp(sym[:, :, None, None] + per_class[None], 1)    # (NT, S, S)

    def rules(self) -> RuleTensors:
        nt = self.nonterminals
        joint = (self.class_prior()[:, None, None] + self.dependent_children()[:, nt:, None]
                 + self.dependent_words()[:, None, :])                         # (R, T, V)
        lexical = torch.log_softmax(torch.logsumexp(joint, 0), -1)             # (T, V)
        return RuleTensors(self.root_symbols()[:nt], self.symbol_rules(), lexical)

    def to_grammar(self, nonterminals: list[str], preterminals: list[str], vocab: Vocabulary,
                   start: str = "ROOT") -> Grammar:
        with torch.no_grad():
            return rules_to_grammar(self.rules(), nonterminals, preterminals, vocab, start)

    # What a trained model learned about words.

    @torch.no_grad()
    def strongest_word_pairs(self, k: int = 20, candidates: Tensor | None = None,
                             chunk: int = PAIR_CHUNK) -> list[tuple[int, int, float]]:
        """The k (head word, dependent word, score) triples with the highest score, over the
        word ids `candidates` (default: the whole vocabulary) as heads and as dependents.

        score = log p(x' | x) - log p_backoff(x'): how much more likely x' is as a dependent of
        head x than as a dependent under the symbol-only back-off, where
        p(x' | x) = mean_A sum_H p(H | A, x) p(x' | H) and p_backoff(x') the same with p_sym
        in place of p(H | A, x) (a log ratio in the manner of pointwise mutual information; the
        mean over parents is uniform). Heads are taken `chunk` at a time, so the largest table
        formed is chunk x V."""
        words = torch.arange(self.vocab_size) if candidates is None else candidates
        dep = self.dependent_words()[:, words]                                 # (R, W)
        backoff = torch.logsumexp(self.class_prior()[:, None] + dep, 0)        # (W,)
        best: list[tuple[float, int, int]] = []
        for c0 in range(0, len(words), chunk):
            heads = words[c0:c0 + chunk]
            classes = self.head_classes(self.word_embeddings[heads])           # (c, NT, R)
            mean = torch.logsumexp(classes, 1) - math.log(self.nonterminals)   # (c, R)
            score = torch.logsumexp(mean[:, :, None] + dep[None], 1) - backoff  # (c, W)
            top = score.flatten().topk(min(k, score.numel()))
            best += [(float(v), int(heads[i // len(words)]), int(words[i % len(words)]))
                     for v, i in zip(top.values, top.indices)]
            best = sorted(best, reverse=True)[:k]
        return [(h, d, s) for s, h, d in best]

    @torch.no_grad()
    def strongest_head_symbols(self, k: int = 20) -> list[tuple[int, int, float]]:
        """The k (symbol, head word, score) triples with the highest pointwise mutual
        information between a child symbol and its head word as the rules draw them together:
        p(C, x) = sum_H rho(H) p(C | H) p(x | H), score = log p(C, x) - log p(C) - log p(x).
        Symbols index the joint list (nonterminals first); the table is S x V."""
        joint = torch.logsumexp(self.class_prior()[:, None, None]
                                + self.dependent_children()[:, :, None]
                                + self.dependent_words()[:, None, :], 0)       # (S, V)
        pmi = joint - torch.logsumexp(joint, 1, keepdim=True) - torch.logsumexp(joint, 0)
        top = pmi.flatten().topk(min(k, pmi.numel()))
        v = self.vocab_size
        return [(int(i) // v, int(i) % v, float(s)) for s, i in zip(top.values, top.indices)]


class LexicalizedScorer:
    """The `Scorer` of the lexicalized model: log p(x) and span posteriors, heads summed."""

    def __init__(self, model: LexicalizedParams):
        self.model = model

    def log_likelihood(self, ids: Tensor, lengths: Tensor) -> Tensor:
        with torch.no_grad():
            return lexicalized_log_partition(self.model.factors(ids, lengths), lengths)

    def span_posteriors(self, ids: Tensor, lengths: Tensor, span_pot: Tensor | None = None
                        ) -> tuple[Tensor, Tensor]:
        """(B,) log p(x_b) and (B, N+1, N+1) span marginals, as the gradient of log Z with
        respect to a zero span potential (Eisner 2016); with `span_pot` (B, N+1, N+1), both
        over the trees it allows (log Z then sums those alone)."""
        with torch.no_grad():
            factors = self.model.factors(ids, lengths)
        B, N = ids.shape
        pot = factors.root.new_zeros(B, N + 1, N + 1, requires_grad=True)
        with torch.enable_grad():
            logz = lexicalized_log_partition(
                factors, lengths,
                span_pot=pot if span_pot is None else pot + span_pot.to(pot.dtype))
            ok = torch.isfinite(logz)
            (spans,) = torch.autograd.grad(torch.where(ok, logz, torch.zeros_like(logz)).sum(),
                                           pot)
        return logz.detach(), spans
