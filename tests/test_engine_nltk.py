"""The engine against NLTK (PyPI `nltk`, a test-only dependency): sentence probability from its
inside chart parser and the Viterbi tree and probability from its Viterbi parser, on random small
grammars in float64, agree with ours to 1e-6 relative."""

from __future__ import annotations

import math

import pytest
import torch

nltk = pytest.importorskip("nltk")
from nltk.grammar import PCFG  # noqa: E402
from nltk.parse.pchart import InsideChartParser  # noqa: E402
from nltk.parse.viterbi import ViterbiParser  # noqa: E402

from _grammars import random_grammar  # noqa: E402
from treewright.inference import score, tree_logprob, viterbi_parse  # noqa: E402
from treewright.trees import tree_from_spans  # noqa: E402


def to_nltk(grammar) -> PCFG:
    """The same grammar in NLTK's notation; the root distribution becomes unary rules from a
    fresh start symbol, which NLTK's parsers accept."""
    names = grammar.symbols
    nt = len(grammar.nonterminals)
    lines = []
    for a in range(nt):
        p = math.exp(float(grammar.root[a]))
        if p > 0:
            lines.append(f"TOP -> {names[a]} [{p!r}]")
    for a, lhs in enumerate(names):
        if a < nt:
            for b, c in torch.nonzero(torch.isfinite(grammar.binary[a])).tolist():
                lines.append(f"{lhs} -> {names[b]} {names[c]} [{math.exp(float(grammar.binary[a, b, c]))!r}]")
        for w in torch.nonzero(torch.isfinite(grammar.lexical[a])).flatten().tolist():
            lines.append(f"{lhs} -> '{grammar.vocab.words[w]}' [{math.exp(float(grammar.lexical[a, w]))!r}]")
    # NLTK checks that each left-hand side sums to one within 1e-6; our sums are exact to ~1e-15.
    return PCFG.fromstring("\n".join(lines))


def nltk_tree_spans(tree) -> set[tuple[int, int, str]]:
    out = set()

    def walk(node, start):
        if isinstance(node, str):
            return start + 1
        pos = start
        for child in node:
            pos = walk(child, pos)
        if node.label() != "TOP":
            out.add((start, pos, node.label()))
        return pos

    walk(tree, 0)
    return out


@pytest.mark.parametrize("seed,nt_emit", [(1, False), (2, False), (3, True), (4, True)])
def test_sentence_probability_and_viterbi_agree_with_nltk(seed, nt_emit):
    grammar = random_grammar(3, 2, 4, seed=seed, nt_emit=nt_emit, sparsity=0.8)
    ours_nltk = to_nltk(grammar)
    gen = torch.Generator().manual_seed(seed)
    sentences = [[grammar.vocab.words[int(i)] for i in torch.randint(4, (n,), generator=gen)]
                 for n in (2, 3, 4, 5, 6)]
    ours = score(grammar, sentences, dtype=torch.float64)
    best = viterbi_parse(grammar, sentences)
    # NLTK's inside chart parser lists every tree, so its cost grows with their number: it
    # checks the sentence probability on the shorter sentences, its Viterbi parser on all.
    inside_lengths = (2, 3, 4) if not nt_emit else (2, 3)
    for words, s, (tree, logp) in zip(sentences, ours, best):
        if len(words) in inside_lengths:
            parses = list(InsideChartParser(ours_nltk, beam_size=0).parse(words))
            total = sum(t.prob() for t in parses)
            assert math.exp(s.logprob) == pytest.approx(total, rel=1e-6)
        nltk_best = next(iter(ViterbiParser(ours_nltk).parse(words)), None)
        if nltk_best is None:
            assert tree is None and s.logprob == -math.inf
            continue
        assert math.exp(logp) == pytest.approx(nltk_best.prob(), rel=1e-6)
        theirs = nltk_tree_spans(nltk_best)
        if set(tree.labeled_spans()) != theirs:
            # A tie: the same rules in another arrangement (repeated words make these exact).
            # NLTK's tree must then score exactly as high under our grammar.
            other = tree_from_spans(words, sorted(theirs))
            assert tree_logprob(grammar, other) == pytest.approx(logp, rel=1e-12)
