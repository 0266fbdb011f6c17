"""A `Grammar` applied to sentences: scores, Viterbi trees, posterior samples, generation.

This is the bridge between named grammars and the tensor engine: it encodes words, batches
sentences of similar length together, and turns the engine's symbol-index spans into `Tree`s.
Sentences the grammar cannot parse are reported (logprob -inf and the reason), never dropped.
"""

from __future__ import annotations

import math
import random
from dataclasses import dataclass, field
from typing import Sequence

import torch
from torch import Tensor

from treewright import engine
from treewright.corpus.batching import length_batches
from treewright.grammar import Grammar
from treewright.trees import Tree, tree_from_spans
from treewright.vocab import Vocabulary

NEG_INF = float("-inf")


@dataclass
class Encoded:
    """One batch of sentences as engine inputs."""
    terminal: Tensor             # (B, N, T) log p(preterminal -> word)
    nt_terminal: Tensor | None   # (B, N, NT) or None in the induction layout
    lengths: Tensor              # (B,)
    unknown: list[list[str]]     # per sentence, the words outside the vocabulary
    ids: Tensor                  # (B, N) word ids; 0 at padding and at unknown words
    known: Tensor                # (B, N) bool: a word of the vocabulary (False at padding)


def pad_ids(sentence_ids: Sequence[Sequence[int]]) -> tuple[Tensor, Tensor]:
    """Word-id lists (-1 for a word outside the vocabulary) as one (B, N) long tensor, padded
    with 0 past each length, and the (B,) lengths."""
    lengths = torch.tensor([len(s) for s in sentence_ids], dtype=torch.long)
    ids = torch.zeros(len(sentence_ids), int(lengths.max()), dtype=torch.long)
    for b, row in enumerate(sentence_ids):
        ids[b, :len(row)] = torch.as_tensor(list(row), dtype=torch.long)
    return ids, lengths


def encode_ids(lexical: Tensor, ids: Tensor, lengths: Tensor, num_nt: int = 0,
               nt_emit: bool | None = None) -> Encoded:
    """The one way sentences become engine inputs: word ids through the lexical rules.

    lexical  (S, V) log p(X -> w), the first `num_nt` rows nonterminals (0: rows are the
             preterminals only, as the induction layout's (T, V) lexical tensors are)
    ids      (B, N) word ids, -1 for a word outside the vocabulary (no rule emits it, so its
             sentence has no parse); positions past `lengths` are ignored
    nt_emit  whether nonterminals emit words (general CNF); None: read it from `lexical`

    Differentiable with respect to `lexical` (gradient training gathers its terminal scores
    here too).
    """
    known = ids >= 0
    safe = ids.clamp(min=0)
    scores = lexical[:, safe].permute(1, 2, 0)                          # (B, N, S)
    if not bool(known.all()):
        scores = scores.masked_fill(~known[..., None], NEG_INF)
    if nt_emit is None:
        nt_emit = bool(torch.isfinite(lexical[:num_nt]).any())
    nt_terminal = scores[..., :num_nt].contiguous() if nt_emit and num_nt else None
    inside = torch.arange(ids.shape[1])[None, :] < lengths[:, None]     # (B, N)
    return Encoded(scores[..., num_nt:].contiguous(), nt_terminal, lengths, [], safe,
                   known & inside)


def encode(grammar: Grammar, sentences: Sequence[Sequence[str]],
           dtype: torch.dtype = torch.float32) -> Encoded:
    """Sentences of words as engine inputs under `grammar` (see `encode_ids`). A word outside
    the vocabulary is read as its shape class when the grammar declares them (refined
    treebank grammars, `Vocabulary.lookup`), else as the unknown word; `unknown` lists it."""
    ids, lengths = pad_ids([grammar.vocab.encode(words) for words in sentences])
    enc = encode_ids(grammar.lexical.to(dtype), ids, lengths, len(grammar.nonterminals),
                     grammar.nonterminals_emit)
    enc.unknown = [[w for w in words if w not in grammar.vocab] for words in sentences]
    return enc


@dataclass
class SentenceScore:
    words: list[str]
    logprob: float                          # natural log; -inf when there is no parse
    unknown: list[str] = field(default_factory=list)

    @property
    def parsed(self) -> bool:
        return self.logprob > NEG_INF


def _engine_args(grammar: Grammar, enc: Encoded, dtype: torch.dtype):
    return (grammar.root.to(dtype), grammar.binary.to(dtype), enc.terminal, enc.lengths,
            enc.nt_terminal)


def _check_words(sentences) -> None:
    for k, s in enumerate(sentences):
        if len(s) == 0:
            raise ValueError(f"sentence {k + 1} is empty")


def score(grammar: Grammar, sentences: Sequence[Sequence[str]], batch_size: int = 64,
          dtype: torch.dtype = torch.float32) -> list[SentenceScore]:
    """log p(sentence) summed over all its trees, per sentence, in input order."""
    _check_words(sentences)
    out: list[SentenceScore | None] = [None] * len(sentences)
    with torch.no_grad():
        for batch in length_batches([len(s) for s in sentences], batch_size):
            enc = encode(grammar, [sentences[i] for i in batch], dtype)
            root, binary, terminal, lengths, nt_terminal = _engine_args(grammar, enc, dtype)
            logz = engine.log_partition(root, binary, terminal, lengths, nt_terminal)
            for k, i in enumerate(batch):
                out[i] = SentenceScore(list(sentences[i]), float(logz[k]), enc.unknown[k])
    return out  # type: ignore[return-value]


def score_rules(rules, vocab: Vocabulary, sentences: Sequence[Sequence[str]],
                batch_size: int = 64, dtype: torch.dtype | None = None) -> list[SentenceScore]:
    """`score` for rules that are no `Grammar` (factored rules, `params.IndependentRules` or
    `params.LowRankRules`, which carry their own engine call): log p(sentence) per sentence, in
    input order, through `rules.log_partition`, in `dtype` (default: the rules' own). `vocab`
    is the rules' vocabulary; a word outside it is read as its unknown-word token and listed
    in `unknown`, or, without that token, leaves its sentence with no parse."""
    _check_words(sentences)
    if dtype is not None:
        rules = type(rules)(*(x.to(dtype) for x in rules))
    out: list[SentenceScore | None] = [None] * len(sentences)
    with torch.no_grad():
        for batch in length_batches([len(s) for s in sentences], batch_size):
            ids, lengths = pad_ids([vocab.encode(sentences[i]) for i in batch])
            logz = rules.log_partition(encode_ids(rules.lexical, ids, lengths).terminal, lengths)
            for k, i in enumerate(batch):
                out[i] = SentenceScore(list(sentences[i]), float(logz[k]),
                                       [w for w in sentences[i] if w not in vocab])
    return out  # type: ignore[return-value]


def spans_to_tree(grammar: Grammar, words: Sequence[str], spans) -> Tree:
    names = grammar.symbols
    return tree_from_spans(list(words), [(i, j, names[s]) for i, j, s in spans])


def viterbi_parse(grammar: Grammar, sentences: Sequence[Sequence[str]], batch_size: int = 16,
                  dtype: torch.dtype = torch.float64) -> list[tuple[Tree | None, float]]:
    """The most probable tree of each sentence and its log-probability ((None, -inf) if none)."""
    _check_words(sentences)
    out: list = [None] * len(sentences)
    for batch in length_batches([len(s) for s in sentences], batch_size):
        enc = encode(grammar, [sentences[i] for i in batch], dtype)
        results = engine.viterbi(*_engine_args(grammar, enc, dtype))
        for k, i in enumerate(batch):
            res = results[k]
            out[i] = (None, NEG_INF) if res is None else \
                (spans_to_tree(grammar, sentences[i], res[1]), res[0])
    return out


def posterior_samples(grammar: Grammar, sentences: Sequence[Sequence[str]], num_samples: int,
                      seed: int = 0, dtype: torch.dtype = torch.float64
                      ) -> list[list[Tree] | None]:
    """`num_samples` trees per sentence drawn from p(tree | sentence)."""
    _check_words(sentences)
    gen = torch.Generator().manual_seed(seed)
    enc = encode(grammar, sentences, dtype)
    root, binary, terminal, lengths, nt_terminal = _engine_args(grammar, enc, dtype)
    draws = engine.sample_trees(root, binary, terminal, lengths, num_samples, nt_terminal,
                                generator=gen)
    return [None if d is None else [spans_to_tree(grammar, sentences[b], t) for t in d]
            for b, d in enumerate(draws)]


def generate(grammar: Grammar, num: int, seed: int = 0, max_words: int = 60
             ) -> list[Tree]:
    """Sentences with their trees drawn top-down from the grammar itself (not conditioned on
    any text). A draw that grows past `max_words` is abandoned and drawn again, so a grammar
    that can produce endless trees still yields finite samples; the result is then a draw from
    the grammar conditioned on length <= max_words."""
    rng = random.Random(seed)
    nt = len(grammar.nonterminals)
    names = grammar.symbols
    words = grammar.vocab.words
    binary = grammar.binary.double().exp().flatten(1)        # (NT, S*S)
    lexical = grammar.lexical.double().exp()                  # (S, V)
    S = grammar.num_symbols
    # Per symbol: cumulative weights over [binary rules..., lexical rules...].
    choices = []
    for a in range(S):
        weights = (torch.cat([binary[a], lexical[a]]) if a < nt else lexical[a]).tolist()
        choices.append(weights)
    root = grammar.root.double().exp().tolist()
    out: list[Tree] = []
    attempts = 0
    while len(out) < num:
        attempts += 1
        if attempts > 1000 * max(num, 1):
            raise ValueError(f"could not draw a sentence of at most {max_words} words in "
                             f"{attempts - 1} attempts")
        tree = _grow(rng, rng.choices(range(nt), weights=root)[0], choices, names, words, nt, S,
                     max_words)
        if tree is not None:
            out.append(tree)
    return out


def _grow(rng, top, choices, names, words, nt, S, max_words) -> Tree | None:
    root = Tree(names[top])
    stack = [(root, top)]
    leaves = 0
    while stack:
        node, a = stack.pop()
        weights = choices[a]
        k = rng.choices(range(len(weights)), weights=weights)[0]
        binary_count = S * S if a < nt else 0
        if k >= binary_count:
            node.children.append(words[k - binary_count])
            leaves += 1
            if leaves > max_words:
                return None
            continue
        b, c = divmod(k, S)
        left, right = Tree(names[b]), Tree(names[c])
        node.children.extend([left, right])
        stack.extend([(right, c), (left, b)])
        if leaves + len(stack) > max_words:
            return None
    return root


def tree_logprob(grammar: Grammar, tree: Tree) -> float:
    """log p(tree): the sum of its rules' log-probabilities (the root rule included). Raises
    ValueError for a tree the grammar cannot build (unknown symbol, unary or n-ary node)."""
    index = {name: i for i, name in enumerate(grammar.symbols)}
    nt = len(grammar.nonterminals)
    if tree.label not in index or index[tree.label] >= nt and not tree.is_preterminal():
        raise ValueError(f"{tree.label} cannot be the top of a tree")
    total = float(grammar.root[index[tree.label]]) if tree.label in index and \
        index[tree.label] < nt else NEG_INF
    for node in tree.subtrees():
        a = index.get(node.label)
        if a is None:
            raise ValueError(f"unknown symbol {node.label}")
        if node.is_preterminal():
            w = grammar.vocab.lookup(node.children[0])
            total += NEG_INF if w < 0 else float(grammar.lexical[a, w])
        elif len(node.children) == 2 and all(isinstance(c, Tree) for c in node.children):
            if a >= nt:
                return NEG_INF
            b, c = (index.get(ch.label) for ch in node.children)
            if b is None or c is None:
                raise ValueError("unknown symbol below " + node.label)
            total += float(grammar.binary[a, b, c])
        else:
            raise ValueError(f"node {node.label} is neither binary nor a preterminal")
    return total


def corpus_summary(scores: Sequence[SentenceScore]) -> dict:
    """Total log-likelihood, per-word cross-entropy (nats and bits) and perplexity over the
    sentences that parsed; the unparsed ones are counted beside them."""
    parsed = [s for s in scores if s.parsed]
    words = sum(len(s.words) for s in parsed)
    total = sum(s.logprob for s in parsed)
    xent = -total / words if words else float("nan")
    return {"sentences": len(scores), "parsed": len(parsed),
            "unparsed": len(scores) - len(parsed), "words": words,
            "log_likelihood": total, "cross_entropy_nats": xent,
            "cross_entropy_bits": xent / math.log(2) if words else float("nan"),
            "perplexity": math.exp(xent) if words else float("nan")}
