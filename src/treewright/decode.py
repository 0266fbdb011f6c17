"""Decoders: from a grammar and a sentence to one tree.

- `viterbi`: the most probable tree (the engine's max-semiring pass).
- `mbr`: minimum Bayes risk for unlabeled bracket recall, the binary tree that maximizes the sum
  of its spans' posterior marginals (Goodman 1996, "Parsing Algorithms and Metrics"), found by a
  small CKY over the engine's span marginals; the usual decoder of unsupervised parsing. Each span
  is then labeled with its most probable symbol.
- `max-rule-product`: for refined grammars, the tree of coarse categories that maximizes the
  product of its anchored coarse-rule posteriors (Petrov & Klein 2007, "Improved Inference for
  Unlexicalized Parsing", section 3). A refined grammar names its subcategories `NAME@k`; the
  coarse symbol is the part before the last '@'. Symbols without '@' are their own coarse symbol,
  so on an unrefined grammar this is max-rule-product over the grammar's own symbols.

The labeled marginals and anchored rule posteriors come from `outside_table`, a log-space outside
pass over the engine's inside chart for one sentence.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import torch
from torch import Tensor

from treewright import engine
from treewright.corpus.batching import length_batches
from treewright.grammar import Grammar
from treewright.inference import encode, spans_to_tree
from treewright.trees import Tree, tree_from_spans

NEG_INF = float("-inf")
DECODERS = ("viterbi", "mbr", "max-rule-product")


def mbr_spans(span_marginals: Tensor, length: int) -> list[tuple[int, int]]:
    """The spans (start, end) of width >= 2 of the best binary tree over `length` words.

    span_marginals: (N+1, N+1) indexed [start, width], as in `engine.Posteriors.spans` for one
        sentence (N >= length). Ties go to the leftmost split, so the result is deterministic.
    Returns n - 1 spans, the whole sentence included, for n >= 2; [] for one word.
    """
    n = length
    if n < 2:
        return []
    gain = span_marginals.double().tolist()
    best: dict[tuple[int, int], float] = {(i, i + 1): 0.0 for i in range(n)}
    split: dict[tuple[int, int], int] = {}
    for width in range(2, n + 1):
        for i in range(0, n - width + 1):
            j = i + width
            k_best, v_best = i + 1, float("-inf")
            for k in range(i + 1, j):
                v = best[(i, k)] + best[(k, j)]
                if v > v_best:
                    k_best, v_best = k, v
            best[(i, j)] = v_best + gain[i][width]
            split[(i, j)] = k_best
    out: list[tuple[int, int]] = []
    stack = [(0, n)]
    while stack:
        i, j = stack.pop()
        if j - i < 2:
            continue
        out.append((i, j))
        k = split[(i, j)]
        stack.extend([(k, j), (i, k)])
    return out


def tree_average(trees: Sequence[Sequence[tuple[int, int]]], length: int
                 ) -> list[tuple[int, int]]:
    """The binary tree over `length` words with the largest summed F1 against `trees` (the
    spans, width >= 2, of one binary tree each, e.g. several restarts' MBR trees): tree
    averaging of Shayegh, Cao, Zhu, Cheung & Mou 2024, "Ensemble Distillation for Unsupervised
    Constituency Parsing". Every binary tree has n - 1 spans, so summed F1 is the summed count
    of input trees containing each of its spans over n - 1: CKY over those votes
    (`mbr_spans`). Each tree votes once, unlike averaging span posteriors, where one confident
    grammar can outvote the others. Returns spans as `mbr_spans` does."""
    votes = torch.zeros(length + 1, length + 1, dtype=torch.float64)  # (N+1, N+1) [start, width]
    for tree in trees:
        for i, j in tree:
            votes[i, j - i] += 1
    return mbr_spans(votes, length)


def coarse_name(symbol: str) -> str:
    """`NP@1` -> `NP`: the part before the last '@' (the whole name if there is none)."""
    head, sep, _ = symbol.rpartition("@")
    return head if sep else symbol


@dataclass
class Decoded:
    """One decoded sentence. `tree` is None when the grammar cannot parse the sentence."""
    tree: Tree | None
    log_likelihood: float   # log p(sentence), summed over all trees; -inf when no parse
    tree_logprob: float     # log p(tree, sentence), summed over every refinement of the tree's
                            # labels (coarse trees); -inf if the grammar cannot build the tree
    score: float            # the decoder's objective: log p(tree) for viterbi, expected number
                            # of correct spans for mbr, log product of rule posteriors for mrp

    @property
    def posterior(self) -> float:
        """p(tree | sentence); 0 when there is no parse."""
        if self.log_likelihood == NEG_INF or self.tree_logprob == NEG_INF:
            return 0.0
        return math.exp(self.tree_logprob - self.log_likelihood)


@dataclass
class SentenceTables:
    """Log inside and outside scores of every symbol over every span of one sentence."""
    inside: Tensor     # (n+1, n+1, S) [start, width, symbol]; -inf where impossible
    outside: Tensor    # (n+1, n+1, S)
    logz: float        # log p(sentence)

    def label_marginals(self) -> Tensor:
        """(n+1, n+1, S) p(symbol spans [start, width] | sentence)."""
        return (self.inside + self.outside - self.logz).exp().nan_to_num(0.0)


def _inside_table(chart: engine.Chart, b: int, n: int, nt: int, t: int) -> Tensor:
    """(n+1, n+1, S) log inside scores read from the engine's chart for sentence b."""
    table = chart.term.new_full((n + 1, n + 1, nt + t), NEG_INF)
    for i in range(n):
        table[i, 1, nt:] = chart.log_term(i, b)
        if chart.min_width == 1:
            table[i, 1, :nt] = chart.log_inside(i, 1, b)
    for w in range(2, n + 1):
        for i in range(n - w + 1):
            table[i, w, :nt] = chart.log_inside(i, w, b)
    return table


def outside_table(root: Tensor, binary: Tensor, inside: Tensor, n: int) -> Tensor:
    """(n+1, n+1, S) log outside scores of one sentence, top-down from the root.

    root (NT,) and binary (NT, S, S) are log-probabilities; inside is `_inside_table`'s output.
    Per span, the parent's outside is folded into the rules once, G[B, C] = logsumexp_A(O[A] +
    log p(A -> B C)), so each split costs S^2 rather than NT S^2.
    """
    nt = binary.shape[0]
    outside = torch.full_like(inside, NEG_INF)
    outside[0, n, :nt] = root
    for w in range(n, 1, -1):
        for i in range(n - w + 1):
            parent = outside[i, w, :nt]                                  # (NT,)
            if not torch.isfinite(parent).any():
                continue
            folded = torch.logsumexp(parent[:, None, None] + binary, 0)  # (S, S)
            us = torch.arange(1, w)
            left_in = inside[i, us]                                      # (w-1, S)
            right_in = inside[i + us, w - us]                            # (w-1, S)
            to_left = torch.logsumexp(folded[None] + right_in[:, None, :], -1)   # (w-1, S)
            to_right = torch.logsumexp(folded[None] + left_in[:, :, None], -2)   # (w-1, S)
            outside[i, us] = torch.logaddexp(outside[i, us], to_left)
            outside[i + us, w - us] = torch.logaddexp(outside[i + us, w - us], to_right)
    return outside


def sentence_tables(grammar: Grammar, sentences: Sequence[Sequence[str]],
                    dtype: torch.dtype = torch.float64) -> list[SentenceTables | None]:
    """Inside/outside tables per sentence (None when the sentence has no parse)."""
    enc = encode(grammar, sentences, dtype)
    root, binary = grammar.root.to(dtype), grammar.binary.to(dtype)
    nt, t = len(grammar.nonterminals), len(grammar.preterminals)
    with torch.no_grad():
        logz = engine.log_partition(root, binary, enc.terminal, enc.lengths, enc.nt_terminal)
        chart = engine.inside_chart(binary, *_padded(enc))
    out: list[SentenceTables | None] = []
    for b, words in enumerate(sentences):
        if not torch.isfinite(logz[b]):
            out.append(None)
            continue
        n = len(words)
        inside = _inside_table(chart, b, n, nt, t)
        out.append(SentenceTables(inside, outside_table(root, binary, inside, n), float(logz[b])))
    return out


def _padded(enc):
    """Terminal scores with probability-one emissions past each length (as the engine pads)."""
    N = enc.terminal.shape[1]
    pad = torch.arange(N)[None, :] >= enc.lengths[:, None]                # (B, N)
    terminal = enc.terminal.masked_fill(pad[..., None], 0.0)
    nt_terminal = None if enc.nt_terminal is None else \
        enc.nt_terminal.masked_fill(pad[..., None], 0.0)
    return terminal, nt_terminal


def coarse_groups(symbols: Sequence[str]) -> tuple[list[str], Tensor]:
    """The coarse names in order of first appearance and the (S, K) 0/1 membership matrix."""
    names: dict[str, int] = {}
    for s in symbols:
        names.setdefault(coarse_name(s), len(names))
    member = torch.zeros(len(symbols), len(names), dtype=torch.float64)
    for k, s in enumerate(symbols):
        member[k, names[coarse_name(s)]] = 1.0
    return list(names), member


def max_rule_product(grammar: Grammar, tables: SentenceTables, n: int
                     ) -> tuple[list[tuple[int, int, str]], float]:
    """The coarse tree maximizing the product of anchored coarse-rule posteriors.

    Petrov & Klein 2007, "Improved Inference for Unlexicalized Parsing", section 3: with
    r(A -> B C, i, k, j) = O(A, i, j) p(A -> B C) I(B, i, k) I(C, k, j) / p(sentence), the coarse
    rule posterior q(a -> b c, i, k, j) sums r over the subcategories of a, b and c. The tree's
    score multiplies q over its binary nodes, the coarse label posterior of each word's
    preterminal (its lexical rule), and the posterior of the top label (the root rule).
    Returns the labeled spans (start, end, coarse label), words included, and the log score.
    """
    nt = len(grammar.nonterminals)
    names, member = coarse_groups(grammar.symbols)               # member (S, K)
    member = member.to(tables.inside.dtype)
    K = len(names)
    binary = grammar.binary.to(tables.inside.dtype)
    marg = tables.label_marginals()                              # (n+1, n+1, S)
    coarse_marg = marg @ member                                  # (n+1, n+1, K)
    best = torch.full((n + 1, n + 1, K), NEG_INF, dtype=member.dtype)
    back: dict[tuple[int, int, int], tuple[int, int, int]] = {}
    best[:n, 1] = coarse_marg[:n, 1].log()
    parent_member = member[:nt]                                  # (NT, K)
    for w in range(2, n + 1):
        us = torch.arange(1, w)
        for i in range(n - w + 1):
            left_in = tables.inside[i, us]                       # (w-1, S)
            right_in = tables.inside[i + us, w - us]             # (w-1, S)
            # (w-1, NT, S, S) anchored fine rule posteriors r(A -> B C, i, i+u, i+w)
            fine = (tables.outside[i, w, :nt, None, None] + binary
                    + left_in[:, None, :, None] + right_in[:, None, None, :] - tables.logz).exp()
            coarse = torch.einsum("uabc,ax,by,cz->uxyz", fine, parent_member, member, member)
            children = best[i, us][:, None, :, None] + best[i + us, w - us][:, None, None, :]
            total = coarse.log() + children                      # (w-1, K, K, K)
            flat = total.permute(1, 0, 2, 3).reshape(K, -1)      # (K, (w-1) K K)
            value, arg = flat.max(-1)
            best[i, w] = value
            for x in range(K):
                if value[x] > NEG_INF:
                    u, y, z = torch.unravel_index(arg[x], (w - 1, K, K))
                    back[(i, w, x)] = (int(u) + 1, int(y), int(z))
    top_scores = best[0, n] + coarse_marg[0, n].log()
    top = int(top_scores.argmax())
    spans: list[tuple[int, int, str]] = []
    stack = [(0, n, top)]
    while stack:
        i, w, x = stack.pop()
        spans.append((i, i + w, names[x]))
        if w > 1:
            u, y, z = back[(i, w, x)]
            stack.extend([(i + u, w - u, z), (i, u, y)])
    return spans, float(top_scores[top])


def tree_logprob_summed(grammar: Grammar, tree: Tree) -> float:
    """log of the summed probability of every fine tree whose labels map onto `tree`'s labels
    by `coarse_name` (for an unrefined grammar: log p(tree) itself). Nodes must be binary or
    preterminals; unknown labels or words give -inf."""
    symbols = grammar.symbols
    nt = len(grammar.nonterminals)
    dtype = torch.float64
    binary, lexical = grammar.binary.to(dtype), grammar.lexical.to(dtype)

    def allowed(label: str) -> Tensor:
        return torch.tensor([coarse_name(s) == label or s == label for s in symbols])

    # Post-order over the tree, iteratively (trees may be deep): scores[id(node)] is (S,).
    scores: dict[int, Tensor] = {}
    order = list(tree.subtrees())
    for node in reversed(order):
        mask = allowed(node.label)
        if node.is_preterminal():
            w = grammar.vocab.encode([node.children[0]])[0]
            col = lexical[:, w] if w >= 0 else torch.full((len(symbols),), NEG_INF, dtype=dtype)
            scores[id(node)] = col.masked_fill(~mask, NEG_INF)
        elif len(node.children) == 2 and all(isinstance(c, Tree) for c in node.children):
            left, right = (scores[id(c)] for c in node.children)
            inner = torch.logsumexp(binary + left[None, :, None] + right[None, None, :], (1, 2))
            full = torch.full((len(symbols),), NEG_INF, dtype=dtype)
            full[:nt] = inner
            scores[id(node)] = full.masked_fill(~mask, NEG_INF)
        else:
            raise ValueError(f"node {node.label} is neither binary nor a preterminal")
    top = scores[id(tree)][:nt]
    return float(torch.logsumexp(grammar.root.to(dtype) + top, 0))


def decode(grammar: Grammar, sentences: Sequence[Sequence[str]], decoder: str = "mbr",
           batch_size: int = 16, dtype: torch.dtype = torch.float64) -> list[Decoded]:
    """One tree per sentence, in input order, by the named decoder (see `DECODERS`)."""
    if decoder not in DECODERS:
        raise ValueError(f"unknown decoder {decoder!r}; choose one of {', '.join(DECODERS)}")
    for k, s in enumerate(sentences):
        if len(s) == 0:
            raise ValueError(f"sentence {k + 1} is empty")
    out: list[Decoded | None] = [None] * len(sentences)
    for batch in length_batches([len(s) for s in sentences], batch_size):
        words = [list(sentences[i]) for i in batch]
        for k, result in enumerate(_decode_batch(grammar, words, decoder, dtype)):
            out[batch[k]] = result
    return out  # type: ignore[return-value]


def _decode_batch(grammar, sentences, decoder, dtype) -> list[Decoded]:
    if decoder == "viterbi":
        enc = encode(grammar, sentences, dtype)
        results = engine.viterbi(grammar.root.to(dtype), grammar.binary.to(dtype), enc.terminal,
                                 enc.lengths, enc.nt_terminal)
        logz = engine.log_partition(grammar.root.to(dtype), grammar.binary.to(dtype),
                                    enc.terminal, enc.lengths, enc.nt_terminal)
        return [Decoded(None, NEG_INF, NEG_INF, NEG_INF) if res is None else
                Decoded(spans_to_tree(grammar, words, res[1]), float(z), res[0], res[0])
                for words, res, z in zip(sentences, results, logz)]
    if decoder == "mbr":
        return _mbr_batch(grammar, sentences, dtype)
    out = []
    for words, tables in zip(sentences, sentence_tables(grammar, sentences, dtype)):
        if tables is None:
            out.append(Decoded(None, NEG_INF, NEG_INF, NEG_INF))
            continue
        spans, value = max_rule_product(grammar, tables, len(words))
        tree = tree_from_spans(words, spans)
        out.append(Decoded(tree, tables.logz, tree_logprob_summed(grammar, tree), value))
    return out


def _mbr_batch(grammar, sentences, dtype) -> list[Decoded]:
    enc = encode(grammar, sentences, dtype)
    post = engine.posteriors(grammar.root.to(dtype), grammar.binary.to(dtype), enc.terminal,
                             enc.lengths, enc.nt_terminal)
    symbols = grammar.symbols
    nt = len(grammar.nonterminals)
    out = []
    for b, (words, tables) in enumerate(zip(sentences, sentence_tables(grammar, sentences,
                                                                       dtype))):
        if tables is None:
            out.append(Decoded(None, NEG_INF, NEG_INF, NEG_INF))
            continue
        n = len(words)
        marg = tables.label_marginals()                          # (n+1, n+1, S)
        spans = mbr_spans(post.spans[b], n)                      # [] for one word
        gain = sum((float(post.spans[b, i, j - i]) for i, j in spans), 0.0)
        # Wider spans take their most probable nonterminal, words their most probable symbol
        # (a one-word sentence's single node must be a nonterminal: it is the top).
        labeled = [(i, j, symbols[int(marg[i, j - i, :nt].argmax())]) for i, j in spans]
        word_labels = marg[:n, 1, :nt] if n == 1 else marg[:n, 1]
        labeled += [(i, i + 1, symbols[int(word_labels[i].argmax())]) for i in range(n)]
        tree = tree_from_spans(words, labeled)
        out.append(Decoded(tree, tables.logz, tree_logprob_summed(grammar, tree), gain))
    return out


def mbr_decode(grammar: Grammar, sentences: Sequence[Sequence[str]], batch_size: int = 16,
               dtype: torch.dtype = torch.float64) -> list[Tree | None]:
    """MBR trees (see the module docstring), None for sentences the grammar cannot parse."""
    return [d.tree for d in decode(grammar, sentences, "mbr", batch_size, dtype)]
