"""Left- and right-branching baselines on an open treebank, against an independent computation.

Data: the Turkish Web Treebank `web` section as shipped by the PyPI package turkish-treebanks
(Apache-2.0), read here with the `conllu` package directly. Gold brackets are the yields of the
dependency subtrees (a common way to turn a dependency treebank into brackets, common practice),
computed in this file; nothing from treewright is used for the reference numbers.
"""

from __future__ import annotations

import os
import statistics
import sysconfig

import pytest

conllu = pytest.importorskip("conllu")

from treewright.evaluation import BracketConventions, Bracketing, evaluate_brackets  # noqa: E402

WEB = os.path.join(sysconfig.get_paths()["purelib"], "data", "web.conllu")


@pytest.fixture(scope="module")
def sentences():
    if not os.path.exists(WEB):
        pytest.skip("turkish-treebanks is not installed")
    with open(WEB, encoding="utf-8") as handle:
        parsed = conllu.parse(handle.read())
    out = []
    for sentence in parsed:
        tokens = [t for t in sentence if isinstance(t["id"], int)]  # no multiword or empty nodes
        out.append(([t["form"] for t in tokens], [t["upos"] for t in tokens],
                    {t["id"]: t["head"] for t in tokens}))
    return out


def subtree_yields(heads: dict[int, int]) -> list[set[int]]:
    """For every token id, the set of ids in its dependency subtree (itself included)."""
    yields = {i: {i} for i in heads}
    for i in heads:
        j = heads[i]
        seen = {i}
        while j != 0 and j not in seen:  # walk up to the root, adding i to every ancestor
            yields[j].add(i)
            seen.add(j)
            j = heads[j]
    return list(yields.values())


def reference_gold(words, tags, heads):
    """Gold spans over the words left after removing UPOS PUNCT, by this file's own rules.

    A subtree counts when its non-punctuation words are contiguous once punctuation is gone
    (non-projective subtrees have gaps and are not brackets); width-one spans are dropped and so
    is the whole sentence (excluded by default, common practice).
    """
    kept = [i + 1 for i, tag in enumerate(tags) if tag != "PUNCT"]
    position = {tid: k for k, tid in enumerate(kept)}
    m = len(kept)
    spans = set()
    full_spans = set()  # the same brackets written over the full sentence, for treewright to reduce
    for members in subtree_yields(heads):
        inner = sorted(position[t] for t in members if t in position)
        if len(inner) >= 2 and inner[-1] - inner[0] + 1 == len(inner):
            if (inner[0], inner[-1] + 1) != (0, m):
                spans.add((inner[0], inner[-1] + 1))
            full_spans.add((kept[inner[0]] - 1, kept[inner[-1]]))
    return m, spans, full_spans


def reference_sentence_f1(sentences, side):
    scores = []
    for words, tags, heads in sentences:
        m, gold, _ = reference_gold(words, tags, heads)
        if side == "left":
            pred = {(0, j) for j in range(2, m)}  # ((w1 w2) w3) ... without the whole sentence
        else:
            pred = {(i, m) for i in range(1, m - 1)}
        if not pred and not gold:
            continue  # skipped, as treewright's default convention says
        scores.append(2 * len(pred & gold) / (len(pred) + len(gold)))
    return statistics.fmean(scores), len(scores)


def test_branching_baselines_match_independent_computation(sentences):
    gold = []
    for words, tags, heads in sentences:
        _, _, full_spans = reference_gold(words, tags, heads)
        gold.append(Bracketing.from_spans(words, full_spans, tags))
    conventions = BracketConventions(punctuation_tags=frozenset({"PUNCT"}), random_draws=1)
    result = evaluate_brackets(None, gold, conventions)
    left, left_n = reference_sentence_f1(sentences, "left")
    right, right_n = reference_sentence_f1(sentences, "right")
    # Every UPOS PUNCT token is removed, counted directly from the file.
    assert result.counts["punctuation_words_removed"] == sum(t.count("PUNCT") for _, t, _ in sentences)
    assert result.counts["evaluated"] == len(sentences)
    assert result.systems["left_branching"].sentence_f1 == pytest.approx(left, abs=1e-12)
    assert result.systems["left_branching"].sentences_scored == left_n
    assert result.systems["right_branching"].sentence_f1 == pytest.approx(right, abs=1e-12)
    assert result.systems["right_branching"].sentences_scored == right_n
    # Turkish is head-final: a dependent's subtree ends at its head, so dependency yields are
    # mostly prefixes of the phrases they sit in, and left-branching wins (a fact of the trade,
    # common practice; the margin is large here).
    assert left > right + 0.1
    print(f"web section, sentence-level F1: left-branching {left:.4f}, right-branching {right:.4f}")
