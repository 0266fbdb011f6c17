"""Many-to-one accuracy and V-measure against scikit-learn, brute force and hand examples."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from sklearn.metrics import homogeneity_completeness_v_measure, v_measure_score

from treewright.errors import InputError
from treewright.evaluation import evaluate_tags, preterminal_labels
from treewright.trees import Tree


def sentences(flat, cuts):
    """Cut a flat labeling into sentences at `cuts` (the scores only see the tokens)."""
    return [list(part) for part in np.split(np.asarray(flat), cuts)]


@pytest.mark.parametrize("seed", range(12))
def test_v_measure_agrees_with_scikit_learn(seed):
    # Reference: scikit-learn's homogeneity_completeness_v_measure and v_measure_score (beta=1
    # and beta=0.5) on seeded random labelings of varied sizes, including one-label cases.
    rng = np.random.default_rng(seed)
    tokens = int(rng.integers(2, 300))
    gold = rng.integers(0, int(rng.integers(1, 12)), size=tokens)
    induced = rng.integers(0, int(rng.integers(1, 30)), size=tokens)
    if seed % 4 == 0:
        induced = gold * 7 % 5  # a function of gold: a many-to-one case
    cuts = sorted(rng.choice(np.arange(1, tokens), size=min(5, tokens - 1), replace=False))
    ours = evaluate_tags(sentences(induced, cuts), sentences(gold, cuts))
    h, c, v = homogeneity_completeness_v_measure(gold, induced)
    assert (ours.homogeneity, ours.completeness, ours.v_measure) == pytest.approx((h, c, v), abs=1e-10)
    ours_beta = evaluate_tags([list(induced)], [list(gold)], beta=0.5)
    assert ours_beta.v_measure == pytest.approx(v_measure_score(gold, induced, beta=0.5), abs=1e-10)


def brute_many_to_one(induced, gold) -> float:
    """Brute force: the best accuracy over every map from induced labels to gold tags."""
    clusters, tags = sorted(set(induced)), sorted(set(gold))
    best = 0
    for mapping in itertools.product(tags, repeat=len(clusters)):
        assign = dict(zip(clusters, mapping))
        best = max(best, sum(assign[k] == g for k, g in zip(induced, gold)))
    return best / len(gold)


@pytest.mark.parametrize("seed", range(8))
def test_many_to_one_is_the_best_map(seed):
    rng = np.random.default_rng(100 + seed)
    tokens = int(rng.integers(1, 40))
    gold = list(rng.integers(0, 4, size=tokens))
    induced = list(rng.integers(0, 5, size=tokens))
    assert evaluate_tags([induced], [gold]).many_to_one == pytest.approx(brute_many_to_one(induced, gold))


def test_hand_example():
    # Gold N N V V, induced a a a b. Many-to-one: a -> N (2 of 3), b -> V (1) = 3/4 (by hand).
    # A perfect relabeling scores 1 everywhere (definition).
    scores = evaluate_tags([["a", "a"], ["a", "b"]], [["N", "N"], ["V", "V"]])
    assert scores.many_to_one == 0.75
    assert (scores.tokens, scores.induced_labels, scores.gold_labels) == (4, 2, 2)
    perfect = evaluate_tags([["x", "y", "x"]], [["N", "V", "N"]])
    assert (perfect.many_to_one, perfect.homogeneity, perfect.completeness, perfect.v_measure) == (1, 1, 1, 1)


def test_preterminal_labels_from_an_induced_tree():
    tree = Tree("S", [Tree("X", [Tree("T3", ["zo"]), Tree("T1", ["kela"])]), Tree("T3", ["mir"])])
    assert preterminal_labels(tree) == ["T3", "T1", "T3"]
    with pytest.raises(ValueError):
        preterminal_labels(Tree("S", [Tree("T1", ["zo"]), "kela"]))


def test_mismatches_name_the_sentence():
    with pytest.raises(InputError) as err:
        evaluate_tags([["a"], ["a", "b"]], [["N"], ["N"]], induced_path="tags.txt")
    assert err.value.line == 2 and "tags.txt, line 2" in str(err.value)
    with pytest.raises(InputError, match="sentence 2"):
        evaluate_tags([["a"]], [["N"], ["V"]])
    with pytest.raises(InputError):
        evaluate_tags([], [])


def test_to_dict_states_conventions():
    data = evaluate_tags([["a", "b"]], [["N", "V"]]).to_dict()
    assert data["v_measure"] == 1.0 and "Rosenberg" in data["conventions"]["v_measure"]
