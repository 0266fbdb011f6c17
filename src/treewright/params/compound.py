"""The compound PCFG of Kim, Dyer & Rush (2019), "Compound Probabilistic Context-Free Grammars
for Grammar Induction" (section 3).

Each sentence has a latent vector z ~ N(0, I). The rule distributions are those of the neural
PCFG (`params.neural`) with z appended to every network's input, so the grammar varies from
sentence to sentence while the symbols' embeddings are shared. Training maximizes the evidence
lower bound

    ELBO(x) = E_q(z|x)[log p(x | z)] - KL(q(z|x) || N(0, I)),

with q a diagonal Gaussian from an inference network (a bidirectional LSTM over the word
embeddings, pooled over positions) and one reparameterized sample per sentence (amortized
variational inference). log p(x | z) is the inside pass over that sentence's own rules.

Decoding and dev scores use z = the posterior mean of q; the grammar written to a file is the
one at z = 0, the prior's mean (a plain PCFG, exportable like any other).

The paper's networks are larger (latent 64, word embeddings and LSTM 512; from memory) and
pool by max; here the sizes follow `embedding_dim`, and pooling is the mean over the words.
"""

from __future__ import annotations

from typing import NamedTuple

import torch
from torch import Tensor, nn

from treewright import engine
from treewright.grammar import Grammar
from treewright.params.neural import EmbeddingParams, mlp
from treewright.params.tabular import RuleTensors, rules_to_grammar
from treewright.vocab import Vocabulary


class CompoundRules(NamedTuple):
    """Per-sentence rule log-probabilities, with each sentence's KL term."""
    root: Tensor     # (B, NT)
    binary: Tensor   # (B, NT, S, S)
    lexical: Tensor  # (B, T, V)
    kl: Tensor       # (B,) KL(q(z|x) || N(0, I)) in nats

    def sentence(self, b: int) -> RuleTensors:
        return RuleTensors(self.root[b], self.binary[b], self.lexical[b])


def gaussian_kl(mean: Tensor, logvar: Tensor) -> Tensor:
    """KL(N(mean, diag exp(logvar)) || N(0, I)) per row, summed over the last axis."""
    return 0.5 * (mean.pow(2) + logvar.exp() - 1.0 - logvar).sum(-1)


class CompoundParams(EmbeddingParams):
    """Neural PCFG whose networks also read a per-sentence latent vector.

    nonterminals, preterminals, vocab_size: NT, T, V.
    latent_dim: size of z (the paper: 64).
    dim, blocks: embedding/hidden size and residual blocks, as in `NeuralParams`.
    """

    def __init__(self, nonterminals: int, preterminals: int, vocab_size: int,
                 latent_dim: int = 64, dim: int = 256, blocks: int = 2,
                 generator: torch.Generator | None = None, dtype: torch.dtype = torch.float32):
        super().__init__()
        s = nonterminals + preterminals
        self.nonterminals, self.preterminals, self.vocab_size = nonterminals, preterminals, \
            vocab_size
        self.latent_dim = latent_dim
        self.start_embedding = nn.Parameter(torch.empty(1, dim))
        self.nonterminal_embeddings = nn.Parameter(torch.empty(nonterminals, dim))
        self.preterminal_embeddings = nn.Parameter(torch.empty(preterminals, dim))
        self.root_net = mlp(dim + latent_dim, blocks, nonterminals, hidden=dim)
        self.binary_net = nn.Linear(dim + latent_dim, s * s)
        self.lexical_net = mlp(dim + latent_dim, blocks, vocab_size, hidden=dim)
        # The inference network q(z | x).
        self.word_embeddings = nn.Embedding(vocab_size, dim)
        self.encoder = nn.LSTM(dim, dim, batch_first=True, bidirectional=True)
        self.posterior = nn.Linear(2 * dim, 2 * latent_dim)
        self.to(dtype)
        self._initialise(generator)

    @classmethod
    def from_options(cls, options, vocab_size: int, generator: torch.Generator | None,
                     dtype: torch.dtype) -> "CompoundParams":
        return cls(options.nonterminals, options.preterminals, vocab_size, options.latent_dim,
                   options.embedding_dim, options.residual_blocks, generator, dtype)

    @staticmethod
    def memory_shape(options) -> dict:
        """The inside-outside memory estimate's arguments (`engine.memory`): rules per sentence."""
        return {"rules_per_sentence": True}

    def log_partition(self, ids: Tensor, lengths: Tensor, span_pot: Tensor | None = None,
                      generator: torch.Generator | None = None) -> tuple[Tensor, Tensor]:
        """(B,) log p(x_b | z_b) at one reparameterized sample z_b ~ q(z | x_b) drawn from
        `generator`, with gradient, and the (B,) KL(q(z | x_b) || N(0, I))."""
        rules = self.sentence_rules(ids, lengths, generator)
        return compound_log_partition(rules, ids, lengths, span_pot), rules.kl

    def scorer(self, rules=None) -> "CompoundScorer":
        """Dev scores with each sentence's grammar at the mean of q(z | x) (`rules` unused:
        the grammar depends on the sentence)."""
        return CompoundScorer(self)

    def encode(self, ids: Tensor, lengths: Tensor) -> tuple[Tensor, Tensor]:
        """Mean and log-variance (B, latent) of q(z | x) for word ids (B, N)."""
        hidden, _ = self.encoder(self.word_embeddings(ids))              # (B, N, 2d)
        mask = (torch.arange(ids.shape[1])[None, :] < lengths[:, None]).to(hidden.dtype)
        pooled = (hidden * mask[..., None]).sum(1) / lengths[:, None].to(hidden.dtype)
        mean, logvar = self.posterior(pooled).chunk(2, -1)
        return mean, logvar

    def rules_at(self, z: Tensor) -> tuple[Tensor, Tensor, Tensor]:
        """Root (B, NT), binary (B, NT, S, S) and lexical (B, T, V) log-probabilities at z."""
        B, nt, t = z.shape[0], self.nonterminals, self.preterminals
        s = nt + t

        def with_z(emb: Tensor) -> Tensor:                             # (K, d) -> (B, K, d+z)
            return torch.cat([emb.expand(B, -1, -1), z[:, None, :].expand(-1, emb.shape[0], -1)],
                             -1)

        root = torch.log_softmax(self.root_net(with_z(self.start_embedding))[:, 0], -1)
        binary = torch.log_softmax(self.binary_net(with_z(self.nonterminal_embeddings)), -1)
        lexical = torch.log_softmax(self.lexical_net(with_z(self.preterminal_embeddings)), -1)
        return root, binary.view(B, nt, s, s), lexical

    def sentence_rules(self, ids: Tensor, lengths: Tensor,
                       generator: torch.Generator | None = None) -> CompoundRules:
        """Rules for each sentence at one reparameterized sample z ~ q(z | x); with no
        generator, at the posterior mean (for decoding and dev scores)."""
        mean, logvar = self.encode(ids, lengths)
        if generator is None:
            z = mean
        else:
            noise = torch.randn(mean.shape, generator=generator, dtype=torch.float64)
            z = mean + (0.5 * logvar).exp() * noise.to(mean.dtype)
        return CompoundRules(*self.rules_at(z), gaussian_kl(mean, logvar))

    def rules(self) -> RuleTensors:
        """The grammar at z = 0, the prior's mean."""
        root, binary, lexical = self.rules_at(self.start_embedding.new_zeros(1, self.latent_dim))
        return RuleTensors(root[0], binary[0], lexical[0])

    def to_grammar(self, nonterminals: list[str], preterminals: list[str], vocab: Vocabulary,
                   start: str = "ROOT") -> Grammar:
        with torch.no_grad():
            return rules_to_grammar(self.rules(), nonterminals, preterminals, vocab, start)


def sentence_terminal_scores(lexical: Tensor, ids: Tensor) -> Tensor:
    """(B, N, T) from per-sentence lexical rules (B, T, V) and ids (B, N)."""
    B, T, _ = lexical.shape
    return torch.gather(lexical, 2, ids[:, None, :].expand(B, T, ids.shape[1])).transpose(1, 2)


def compound_log_partition(rules: CompoundRules, ids: Tensor, lengths: Tensor,
                           span_pot: Tensor | None = None) -> Tensor:
    """(B,) log p(x_b | z_b), each sentence under its own rules, in one engine call."""
    terminal = sentence_terminal_scores(rules.lexical, ids)              # (B, N, T)
    return engine.log_partition(rules.root, rules.binary, terminal, lengths, span_pot=span_pot)


def compound_span_posteriors(rules: CompoundRules, ids: Tensor, lengths: Tensor
                             ) -> tuple[Tensor, Tensor]:
    """log p(x_b | z_b) (B,) and span marginals (B, N+1, N+1), each sentence under its own
    rules, in one engine call."""
    terminal = sentence_terminal_scores(rules.lexical, ids).detach()
    post = engine.posteriors(rules.root.detach(), rules.binary.detach(), terminal, lengths)
    return post.logz, post.spans


class CompoundScorer:
    """The `Scorer` of a compound model: each sentence's grammar at the mean of q(z | x); the
    score is the ELBO with z at that mean (the KL term of the sample-free bound)."""

    def __init__(self, model: CompoundParams):
        self.model = model

    def span_posteriors(self, ids: Tensor, lengths: Tensor) -> tuple[Tensor, Tensor]:
        with torch.no_grad():
            rules = self.model.sentence_rules(ids, lengths)
        logz, spans = compound_span_posteriors(rules, ids, lengths)
        return logz - rules.kl, spans

    def log_likelihood(self, ids: Tensor, lengths: Tensor) -> Tensor:
        return self.span_posteriors(ids, lengths)[0]
