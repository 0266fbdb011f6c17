"""Bracket scoring against worked examples computed by hand, brute force and counting.

The sentences are in an invented language (zo, kela, mir, tavu, pen). Gold trees follow the
usual phrase-structure shape; every expected number below is worked out in the comment beside it.
The scoring conventions (width-one spans never count, whole-sentence span excluded by default,
punctuation removed first) are the usual ones of unsupervised parsing evaluation (common practice).
"""

from __future__ import annotations

import itertools
import json
import random
from fractions import Fraction

import pytest
from scipy.stats import chisquare

from treewright.errors import InputError
from treewright.evaluation import (BracketConventions, Bracketing, binary_upper_bound, evaluate_brackets,
                                   left_branching, left_branching_tree, random_binary, right_branching,
                                   right_branching_tree, spans_to_tree)
from treewright.trees import Tree


def parse(text: str) -> Tree:
    """A minimal bracketed-tree reader for the test's own trees (no escapes needed here)."""
    tokens = text.replace("(", " ( ").replace(")", " ) ").split()
    pos = 0

    def node() -> Tree:
        nonlocal pos
        assert tokens[pos] == "("
        label = tokens[pos + 1]
        pos += 2
        children = []
        while tokens[pos] != ")":
            if tokens[pos] == "(":
                children.append(node())
            else:
                children.append(tokens[pos])
                pos += 1
        pos += 1
        return Tree(label, children)

    return node()


# Gold spans of width >= 2: S (0,5), NP (0,2), VP (2,5), NP (3,5).
GOLD_1 = parse("(S (NP (D zo) (N kela)) (VP (V mir) (NP (D tavu) (N pen))))")
# Right-branching: (0,5), (1,5), (2,5), (3,5).
PRED_1 = parse("(X (T zo) (X (T kela) (X (T mir) (X (T tavu) (T pen)))))")

# The same sentence with a comma (position 3) and a full stop (position 6), tagged "," and ".".
# Gold spans: S (0,7), NP (0,2), VP (2,6), NP (4,6); without punctuation exactly GOLD_1's spans.
GOLD_2 = parse("(S (NP (D zo) (N kela)) (VP (V mir) (, ,) (NP (D tavu) (N pen))) (. .))")
WORDS_2 = ["zo", "kela", "mir", ",", "tavu", "pen", "."]
# Removing positions 3 and 6 maps (0,7)->(0,5), (0,4)->(0,3), (2,4)->(2,3) (one word: never counts),
# (4,7)->(3,5) and (4,6)->(3,5) (the same span: counts once).
PRED_2 = Bracketing.from_spans(WORDS_2, [(0, 7), (0, 4), (2, 4), (4, 7), (4, 6)])

# Two words: with the whole sentence excluded neither side has a span.
GOLD_3 = parse("(S (D zo) (N kela))")
PRED_3 = parse("(X (T zo) (T kela))")


def test_precision_recall_f1_without_whole_span():
    # Hand count: gold {(0,2),(2,5),(3,5)}, pred {(1,5),(2,5),(3,5)}, matched 2 -> P = R = F1 = 2/3.
    s = evaluate_brackets([PRED_1], [GOLD_1]).systems["model"]
    assert (s.matched, s.predicted, s.gold) == (2, 3, 3)
    assert s.sentence_precision == s.sentence_recall == s.sentence_f1 == pytest.approx(2 / 3)
    assert s.corpus_precision == s.corpus_recall == s.corpus_f1 == pytest.approx(2 / 3)


def test_precision_recall_f1_with_whole_span():
    # Hand count: adding (0,5) to both sides gives 3 matched of 4 and 4 -> 3/4.
    result = evaluate_brackets([PRED_1], [GOLD_1], BracketConventions(include_whole_span=True))
    s = result.systems["model"]
    assert (s.matched, s.predicted, s.gold) == (3, 4, 4)
    assert s.sentence_f1 == pytest.approx(3 / 4)
    assert result.conventions["whole_sentence_span"] == "counted"


def test_punctuation_removed_and_spans_recomputed():
    # After removal (see PRED_2): pred {(0,3),(3,5)}, gold {(0,2),(2,5),(3,5)}, matched 1:
    # P = 1/2, R = 1/3, F1 = 2*1/(2+3) = 2/5. Punctuation is found by the gold tags "," and ".".
    result = evaluate_brackets([PRED_2], [GOLD_2])
    s = result.systems["model"]
    assert (s.matched, s.predicted, s.gold) == (1, 2, 3)
    assert (s.sentence_precision, s.sentence_recall, s.sentence_f1) == pytest.approx((1 / 2, 1 / 3, 2 / 5))
    assert result.counts["punctuation_words_removed"] == 2
    assert result.counts["words_evaluated"] == 5


def test_punctuation_kept_when_switched_off():
    # Over 7 words: gold {(0,2),(2,6),(4,6)}, pred {(0,4),(2,4),(4,7),(4,6)}, matched 1:
    # P = 1/4, R = 1/3, F1 = 2/7.
    s = evaluate_brackets([PRED_2], [GOLD_2], BracketConventions(remove_punctuation=False)).systems["model"]
    assert (s.sentence_precision, s.sentence_recall, s.sentence_f1) == pytest.approx((1 / 4, 1 / 3, 2 / 7))


def test_punctuation_by_tokens_when_gold_has_no_tags():
    # The same gold as plain spans without tags: "," and "." are in the default token set.
    gold = Bracketing.from_spans(WORDS_2, [(0, 7), (0, 2), (2, 6), (4, 6)])
    s = evaluate_brackets([PRED_2], [gold]).systems["model"]
    assert s.sentence_f1 == pytest.approx(2 / 5)


def test_tags_decide_over_tokens():
    # Penn Treebank tags a possessive apostrophe POS (common practice): a tagged "'" stays a word,
    # an untagged one is taken as a quote and removed.
    words = ["zo", "'", "kela"]
    tagged = Bracketing.from_spans(words, [(0, 3), (0, 2)], tags=["N", "POS", "N"])
    untagged = Bracketing.from_spans(words, [(0, 3), (0, 2)])
    assert evaluate_brackets(None, [tagged]).counts["punctuation_words_removed"] == 0
    assert evaluate_brackets(None, [untagged]).counts["punctuation_words_removed"] == 1


def test_sentence_level_and_corpus_level_differ_as_computed_by_hand():
    # Sentence 1: m=2, p=3, g=3 (F1 2/3); sentence 2: m=1, p=2, g=3 (P 1/2, R 1/3, F1 2/5).
    # Sentence level: F1 (2/3 + 2/5)/2 = 8/15, P (2/3 + 1/2)/2 = 7/12, R (2/3 + 1/3)/2 = 1/2.
    # Corpus level: P 3/5, R 3/6, F1 2*3/(5+6) = 6/11.
    s = evaluate_brackets([PRED_1, PRED_2], [GOLD_1, GOLD_2]).systems["model"]
    assert (s.sentence_f1, s.sentence_precision, s.sentence_recall) == pytest.approx((8 / 15, 7 / 12, 1 / 2))
    assert (s.corpus_f1, s.corpus_precision, s.corpus_recall) == pytest.approx((6 / 11, 3 / 5, 1 / 2))


def test_empty_sentence_policy():
    # Sentence 3 has no span on either side. "skip" leaves the mean at 8/15; "one" counts it as 1:
    # (2/3 + 2/5 + 1)/3 = 31/45. Pooled counts are the same under both.
    preds, golds = [PRED_1, PRED_2, PRED_3], [GOLD_1, GOLD_2, GOLD_3]
    skip = evaluate_brackets(preds, golds)
    one = evaluate_brackets(preds, golds, BracketConventions(empty_sentences="one"))
    assert skip.systems["model"].sentence_f1 == pytest.approx(8 / 15)
    assert skip.systems["model"].sentences_skipped_empty == 1
    assert skip.systems["model"].sentences_scored == 2
    assert one.systems["model"].sentence_f1 == pytest.approx(31 / 45)
    assert one.systems["model"].corpus_f1 == skip.systems["model"].corpus_f1 == pytest.approx(6 / 11)
    assert "left out" in skip.conventions["empty_sentences"]
    assert "= 1" in one.conventions["empty_sentences"]


def test_zero_denominator_gives_zero_against_spans():
    # A flat gold over four words has no counted span; a binary prediction has two: P = 0, and
    # recall has a zero denominator while the other side has spans, so 0 (the stated convention).
    gold = Bracketing.from_spans(["zo", "kela", "mir", "tavu"], [(0, 4)])
    pred = Bracketing.from_spans(["zo", "kela", "mir", "tavu"], [(0, 4), (0, 2), (2, 4)])
    s = evaluate_brackets([pred], [gold]).systems["model"]
    assert (s.sentence_precision, s.sentence_recall, s.sentence_f1) == (0.0, 0.0, 0.0)


def test_length_filter_after_punctuation_removal():
    # Sentence 2 has 7 tokens but 5 words after punctuation removal, so max_length=5 keeps it;
    # with punctuation kept it is 7 long and is filtered (and counted as such).
    kept = evaluate_brackets([PRED_1, PRED_2], [GOLD_1, GOLD_2], BracketConventions(max_length=5))
    assert kept.counts["evaluated"] == 2 and kept.counts["longer_than_max_length"] == 0
    dropped = evaluate_brackets([PRED_1, PRED_2], [GOLD_1, GOLD_2],
                                BracketConventions(max_length=5, remove_punctuation=False))
    assert dropped.counts["evaluated"] == 1 and dropped.counts["longer_than_max_length"] == 1
    assert dropped.systems["model"].sentence_f1 == pytest.approx(2 / 3)  # sentence 1 alone


def test_sentence_of_only_punctuation_is_counted_not_scored():
    gold = Bracketing.from_spans([".", "."], [(0, 2)], tags=[".", "."])
    result = evaluate_brackets([gold], [gold])
    assert result.counts["empty_after_punctuation"] == 1 and result.counts["evaluated"] == 0
    assert result.systems["model"].sentence_f1 is None


def test_unary_chain_counts_once():
    # TOP and S cover the same words: unlabeled, (0,3) counts once; so gold has 2 spans, not 3.
    gold = parse("(TOP (S (NP (D zo) (N kela)) (V mir)))")
    pred = parse("(X (Y (X (T zo) (T kela))) (T mir))")  # (0,2) twice, through the unary Y
    s = evaluate_brackets([pred], [gold], BracketConventions(include_whole_span=True)).systems["model"]
    assert (s.matched, s.predicted, s.gold) == (2, 2, 2)


def test_labeled_f1_on_a_shared_inventory():
    # Unlabeled all 3 spans match. Labeled: pred {NP(0,2), VP(2,5), VP(3,5)} against gold
    # {NP(0,2), VP(2,5), NP(3,5)}: 2 of 3 -> 2/3.
    pred = parse("(S (NP (D zo) (N kela)) (VP (V mir) (VP (D tavu) (N pen))))")
    result = evaluate_brackets([pred], [GOLD_1])
    assert result.systems["model"].sentence_f1 == pytest.approx(1.0)
    assert result.labeled is not None
    assert result.labeled.sentence_f1 == pytest.approx(2 / 3)
    assert result.conventions["labeled"].startswith("computed")


def test_labeled_f1_skipped_for_foreign_labels():
    result = evaluate_brackets([PRED_1], [GOLD_1])
    assert result.labeled is None
    assert "X" in result.conventions["labeled"]


def test_recall_per_gold_label():
    # Right-branching pred {(1,5),(2,5),(3,5)}: NP gold (0,2),(3,5) -> 1 of 2; VP (2,5) -> 1 of 1.
    # Left-branching {(0,2),(0,3),(0,4)}: NP 1 of 2, VP 0 of 1. S is the whole span (not counted).
    recall = evaluate_brackets([PRED_1], [GOLD_1]).label_recall
    assert (recall["model"]["NP"].gold, recall["model"]["NP"].recall) == (2, 0.5)
    assert recall["model"]["VP"].recall == 1.0
    assert recall["left_branching"]["NP"].recall == 0.5
    assert recall["left_branching"]["VP"].recall == 0.0
    assert "S" not in recall["model"]


def test_length_buckets():
    # Edges (3,): bucket 1-3 holds sentence 3 (no spans: skipped, so no sentence-level F1);
    # bucket 4+ holds sentences 1 and 2 (F1 2/3 and 2/5 -> 8/15).
    result = evaluate_brackets([PRED_1, PRED_2, PRED_3], [GOLD_1, GOLD_2, GOLD_3],
                               BracketConventions(length_buckets=(3,)))
    short, long_ = result.buckets
    assert (short.name, short.sentences, long_.name, long_.sentences) == ("1-3", 1, "4+", 2)
    assert short.scores["model"].sentence_f1 is None
    assert long_.scores["model"].sentence_f1 == pytest.approx(8 / 15)


def test_baselines_on_the_same_sentences():
    # Sentence 1, gold {(0,2),(2,5),(3,5)}: left-branching {(0,2),(0,3),(0,4)} matches 1 -> F1 1/3;
    # right-branching {(1,5),(2,5),(3,5)} matches 2 -> 2/3; the gold tree is binary -> bound 1.
    systems = evaluate_brackets([PRED_1], [GOLD_1]).systems
    assert systems["left_branching"].sentence_f1 == pytest.approx(1 / 3)
    assert systems["right_branching"].sentence_f1 == pytest.approx(2 / 3)
    assert systems["binary_upper_bound"].sentence_f1 == pytest.approx(1.0)


def test_branching_builders():
    # By hand: the spans of ((a b) c) d and a (b (c d)).
    assert left_branching(4) == {(0, 2), (0, 3), (0, 4)}
    assert right_branching(4) == {(0, 4), (1, 4), (2, 4)}
    assert left_branching(1) == right_branching(1) == frozenset()
    assert left_branching_tree(["zo", "kela", "mir"]).to_string() == "(X (X zo kela) mir)"
    assert right_branching_tree(["zo", "kela", "mir"], "P", "T").to_string() == \
        "(P (T zo) (P (T kela) (T mir)))"
    assert spans_to_tree(["zo", "kela", "mir"], []).to_string() == "(X zo kela mir)"


def all_binary(start: int, end: int) -> list[frozenset]:
    """Brute force: the span sets of every binary tree over [start, end) (width >= 2 spans)."""
    if end - start == 1:
        return [frozenset()]
    out = []
    for split in range(start + 1, end):
        for left, right in itertools.product(all_binary(start, split), all_binary(split, end)):
            out.append(left | right | {(start, end)})
    return out


def f1_without_whole(pred: frozenset, gold: frozenset, n: int) -> Fraction:
    p = {s for s in pred if s != (0, n)}
    g = {s for s in gold if s != (0, n)}
    return Fraction(2 * len(p & g), len(p) + len(g)) if p or g else Fraction(1)


@pytest.mark.parametrize("n", [2, 3, 4, 5, 6, 7])
def test_binary_upper_bound_is_the_best_binary_tree(n):
    # Brute force: max F1 over every binary tree, against gold trees made by deleting random
    # spans from a random binary tree (so they nest but may be flat).
    trees = all_binary(0, n)
    rng = random.Random(n)
    for _ in range(8):
        gold = frozenset(s for s in rng.choice(trees) if s == (0, n) or rng.random() < 0.5)
        best = max(f1_without_whole(t, gold, n) for t in trees)
        bound = binary_upper_bound(n, gold)
        assert bound in trees and gold <= bound
        assert f1_without_whole(bound, gold, n) == best


def test_binary_upper_bound_rejects_crossing_gold():
    with pytest.raises(ValueError, match="cross"):
        binary_upper_bound(4, [(0, 2), (1, 3)])
    gold = Bracketing.from_spans(["zo", "kela", "mir", "tavu"], [(0, 4), (0, 2), (1, 3)])
    with pytest.raises(InputError, match="sentence 1"):
        evaluate_brackets(None, [gold])


def test_random_binary_is_uniform_over_bracketings():
    # Brute force: the 14 binary trees over 5 words (Catalan number C(4) = 14) should be drawn
    # equally often; a chi-square test at the 0.1% level (seeded, so it does not flake).
    trees = all_binary(0, 5)
    assert len(trees) == 14
    rng = random.Random(7)
    draws = 14 * 300
    tally = {t: 0 for t in trees}
    for _ in range(draws):
        tally[random_binary(5, rng)] += 1
    assert chisquare(list(tally.values())).pvalue > 1e-3


def test_random_baseline_averages_draws():
    # Brute force: the mean F1 of GOLD_1's sentence over all 14 equally likely binary trees; the
    # mean over 2000 draws is within 0.01 (sd of one draw < 0.5, so the mean's sd < 0.012;
    # seeded, so fixed) and the draws vary.
    gold = frozenset({(0, 5), (0, 2), (2, 5), (3, 5)})
    expected = sum(f1_without_whole(t, gold, 5) for t in all_binary(0, 5)) / 14
    result = evaluate_brackets(None, [GOLD_1], BracketConventions(random_draws=2000, random_seed=3))
    assert result.systems["random_binary"].sentence_f1 == pytest.approx(float(expected), abs=0.01)
    assert result.random_sd["sentence_f1"] > 0
    assert result.conventions["random_draws"] == 2000


def test_mismatched_sentence_counts():
    with pytest.raises(InputError) as err:
        evaluate_brackets([PRED_1], [GOLD_1, GOLD_2], pred_path="pred.txt", gold_path="gold.txt")
    assert err.value.line == 2 and err.value.path == "pred.txt"
    assert "pred.txt, line 2" in str(err.value) and "gold.txt" in str(err.value)


def test_mismatched_tokens_name_the_first_sentence():
    other = parse("(X (T zo) (X (T kela) (X (T mir) (X (T tavu) (T dor)))))")
    with pytest.raises(InputError) as err:
        evaluate_brackets([PRED_1, other], [GOLD_1, GOLD_1], pred_path="pred.txt")
    assert err.value.line == 2
    assert "word 5" in str(err.value) and "'dor'" in str(err.value) and "'pen'" in str(err.value)


def test_span_outside_the_sentence():
    bad = Bracketing.from_spans(["zo", "kela"], [(0, 3)])
    with pytest.raises(InputError, match="sentence 1"):
        evaluate_brackets([bad], [GOLD_3])


def test_bad_conventions_are_all_reported():
    with pytest.raises(InputError) as err:
        BracketConventions(empty_sentences="zero", length_buckets=(20, 10), random_draws=0)
    text = str(err.value)
    assert "empty_sentences" in text and "length_buckets" in text and "random_draws" in text


def test_output_dict_and_table():
    result = evaluate_brackets([PRED_1, PRED_2], [GOLD_1, GOLD_2])
    data = json.loads(json.dumps(result.to_dict()))
    assert data["systems"]["model"]["sentence_f1"] == pytest.approx(8 / 15)
    assert set(data["systems"]) == {"model", "left_branching", "right_branching", "random_binary",
                                    "binary_upper_bound"}
    assert data["conventions"]["whole_sentence_span"] == "not counted"
    assert data["conventions"]["one_word_spans"] == "never counted"
    table = result.format_table()
    model_row = next(line for line in table.splitlines() if line.startswith("model"))
    assert model_row.split()[1] == "53.3"  # 8/15 as a percentage
    for title in ("left-branching", "right-branching", "random binary", "binary upper bound", "Conventions"):
        assert title in table


def test_evaluation_imports_no_torch_and_no_reference_libraries():
    # Layering rule of the project: evaluation sits below training and the CLI and uses only numpy.
    import subprocess
    import sys
    code = ("import sys, treewright.evaluation; "
            "print(sorted(m for m in ('torch', 'sklearn', 'nltk', 'treewright.cli') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"


def test_words_that_differ_only_in_unicode_normalization_are_explained():
    # Fact of the trade (Unicode normalization, UAX #15): U+00E9 and U+0065 U+0301 are the same
    # letter, composed and decomposed; the refusal says so and names both code point spellings.
    gold = Bracketing(("t\u00e9ka", "mor"), frozenset({(0, 2, None)}))
    pred = Bracketing(("te\u0301ka", "mor"), frozenset({(0, 2, None)}))
    with pytest.raises(InputError, match="two Unicode normalization forms: U[+]0074 U[+]0065 "
                                         "U[+]0301 U[+]006B U[+]0061 against U[+]0074 U[+]00E9"):
        evaluate_brackets([pred], [gold])
    other = Bracketing(("toka", "mor"), frozenset({(0, 2, None)}))
    with pytest.raises(InputError) as err:
        evaluate_brackets([other], [gold])
    assert "normalization" not in str(err.value)
