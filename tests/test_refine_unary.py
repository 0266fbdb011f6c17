"""Split-merge from treebanks whose phrases stand over a single tag, (NP (NAME x)).

The convention (`refine.cnf_tree`): a unary chain ending in a tag joins the tag, so
(NP (NAME x)) becomes the preterminal NP¦NAME; `from_coarse_trees` undoes it.

References: NLTK's `collapse_unary(collapsePOS=True)` for the joined trees; the input trees
themselves for the round trip; for the coarse grammar, rule count ratios computed in this file
(the maximum-likelihood estimate of a PCFG from trees, common practice). Real trees: the Turkish
Web Treebank (turkish-treebanks package, `web` section), read with the `conllu` package and
turned into phrase trees in which every word projects a phrase over its dependents, so each
word without dependents stands as (XP (X word)) (each word's maximal projection, as in the
dependency-to-phrase conversion of Collins, Hajič, Ramshaw & Tillmann 1999, "A Statistical
Parser for Czech"; the conversion is written in this file).
"""

from __future__ import annotations

import json
import math
import sysconfig
from collections import Counter
from pathlib import Path

import pytest
import torch

from treewright.corpus import UNARY_SEP, trees_equal
from treewright.errors import InputError
from treewright.refine import (cnf_tree, estimate_coarse, load_refine_config, refine,
                               tree_loglik, tree_set)
from treewright.refine.run import from_coarse_trees
from treewright.refine.trees import cnf_problem
from treewright.trees import Tree

nltk_tree = pytest.importorskip("nltk.tree")

HAND = [
    "(S (NP (NAME Orvek)) (VP (VT dorvik) (NP (DET ko) (N tulm))))",
    "(S (NP (DET ko) (N domhar)) (VP (VI voresh)))",
    "(S (NP (NAME Hessa)) (VP (VI lurrik)))",
    "(S (NP (DET ko) (N tulm)) (VP (VT dorvik) (NP (NAME Orvek))))",
]


def parse(text: str) -> Tree:
    return from_nltk(nltk_tree.Tree.fromstring(text))


def from_nltk(t) -> Tree:
    return Tree(t.label(), [c if isinstance(c, str) else from_nltk(c) for c in t])


def test_a_phrase_over_one_tag_joins_it_as_nltk_collapses_tags():
    for text in HAND:
        reference = nltk_tree.Tree.fromstring(text)
        # NLTK's collapse with tags included (collapsePOS=True), our separator as join character.
        nltk_tree.collapse_unary(reference, collapsePOS=True, collapseRoot=True,
                                       joinChar=UNARY_SEP)
        ours = cnf_tree(parse(text))  # these trees are binary already: binarizing adds nothing
        assert trees_equal(ours, from_nltk(reference))
        assert cnf_problem(ours) is None
        assert trees_equal(from_coarse_trees(ours), parse(text))  # reference: the input tree
    assert cnf_tree(parse(HAND[0])).to_string() == \
        "(S (NP¦NAME Orvek) (VP (VT dorvik) (NP (DET ko) (N tulm))))"  # worked by hand


def _refine_config(train: Path, run_dir: Path, extra=()):
    return load_refine_config(None, [
        f"data.train={train}", "data.format=brackets", "data.heldout_fraction=0.25",
        "refine.cycles=1", "refine.em_iterations=3", "refine.smoothed_iterations=1",
        "output.f1_max_sentences=5", "output.tensorboard=false", "output.stdout_metrics=false",
        f"output.run_dir={run_dir}", *extra])


def test_refine_runs_on_hand_trees_with_unary_phrases(tmp_path):
    train = tmp_path / "trees.txt"
    train.write_text("".join(t + "\n" for t in HAND * 10), encoding="utf-8")
    result = refine(_refine_config(train, tmp_path / "run"), tmp_path / "run")
    text = result.grammar_path.read_text(encoding="utf-8")
    assert "NP" + UNARY_SEP + "NAME" in text
    last = json.loads((tmp_path / "run" / "metrics.jsonl").read_text().splitlines()[-1])
    # Each sentence of this corpus has one tree under the coarse grammar, so the held-out
    # parses, with the chains split again, are the gold trees (reference: the gold trees).
    assert last["heldout/labeled_f1"] == 1.0


def test_a_word_beside_phrases_is_refused_with_file_and_line(tmp_path):
    train = tmp_path / "trees.txt"
    train.write_text(HAND[1] + "\n(S (NP ko (N tulm)) (VP (VI voresh)))\n", encoding="utf-8")
    with pytest.raises(InputError) as caught:
        refine(_refine_config(train, tmp_path / "run", ["data.heldout_fraction=0.01"]),
               tmp_path / "run")
    message = str(caught.value)
    assert str(train) in message and "line 2" in message and "'ko'" in message


def test_a_root_label_is_joined_or_refused_with_file_and_line(tmp_path):
    # A ROOT wrapper over one phrase joins it (ROOT¦S); a branching ROOT would be the name of
    # the refined grammar's start symbol, and is refused where it stands.
    wrapped = ["(ROOT " + t + ")" for t in HAND]
    assert cnf_problem(cnf_tree(parse(wrapped[0]))) is None
    train = tmp_path / "trees.txt"
    train.write_text(wrapped[1] + "\n(ROOT (NP (NAME Hessa)) (VP (VI lurrik)))\n",
                     encoding="utf-8")
    with pytest.raises(InputError) as caught:
        refine(_refine_config(train, tmp_path / "run", ["data.heldout_fraction=0.01"]),
               tmp_path / "run")
    assert caught.value.path == str(train) and caught.value.line == 2


# ---- real trees -------------------------------------------------------------------------------

def _web_conllu() -> Path:
    path = Path(sysconfig.get_paths()["purelib"]) / "data" / "web.conllu"
    if not path.exists():
        pytest.skip("turkish-treebanks is not installed")
    return path


def projection_tree(forms: list[str], upos: list[str], heads: list[int]) -> Tree | None:
    """Every word projects a phrase <UPOS>P over its own tag and its dependents' phrases, in
    word order; None for a non-projective sentence (the yield would leave word order)."""
    dependents: dict[int, list[int]] = {i: [] for i in range(len(forms) + 1)}
    for i, h in enumerate(heads, start=1):
        dependents[h].append(i)

    def phrase(i: int) -> Tree:
        parts = sorted(dependents[i] + [i])
        return Tree(upos[i - 1] + "P", [Tree(upos[i - 1], [forms[i - 1]]) if j == i else phrase(j)
                                        for j in parts])

    (root,) = dependents[0]
    tree = phrase(root)
    return tree if tree.leaves() == forms else None


@pytest.fixture(scope="module")
def turkish_trees():
    conllu = pytest.importorskip("conllu")
    trees = []
    for sentence in conllu.parse(_web_conllu().read_text(encoding="utf-8")):
        tokens = [t for t in sentence if isinstance(t["id"], int)]
        if not 3 <= len(tokens) <= 12 or any(c in t["form"] for t in tokens for c in "()"):
            continue
        tree = projection_tree([t["form"] for t in tokens], [t["upos"] for t in tokens],
                               [t["head"] for t in tokens])
        if tree is not None:
            trees.append(tree)
    return trees


def test_turkish_projection_trees_have_unary_phrases_and_round_trip(turkish_trees):
    assert len(turkish_trees) > 300
    unary = sum(1 for t in turkish_trees for n in t.subtrees()
                if len(n.children) == 1 and isinstance(n.children[0], Tree))
    assert unary > len(turkish_trees)  # several (XP (X word)) per tree: the case at hand
    for tree in turkish_trees:
        coarse = cnf_tree(tree)
        assert cnf_problem(coarse) is None
        assert trees_equal(from_coarse_trees(coarse), tree)  # reference: the input tree


def test_turkish_coarse_grammar_is_the_count_ratio_estimate(turkish_trees):
    trees = [t for t in (cnf_tree(t) for t in turkish_trees) if not t.is_preterminal()]
    lg = estimate_coarse(trees)
    ts = tree_set(lg, trees)
    assert ts.dropped == [] and ts.num_trees == len(trees)
    # Independent reference: log p(tree) = log f(top)/N + sum over nodes log f(rule)/f(lhs).
    top = Counter(t.label for t in trees)
    rules: Counter = Counter()
    for t in trees:
        for node in t.subtrees():
            rules[(node.label, tuple(c if isinstance(c, str) else c.label
                                     for c in node.children))] += 1
    lhs: Counter = Counter()
    for (a, _), c in rules.items():
        lhs[a] += c
    expected = []
    for t in trees:
        total = math.log(top[t.label] / len(trees))
        for node in t.subtrees():
            key = (node.label, tuple(c if isinstance(c, str) else c.label for c in node.children))
            total += math.log(rules[key] / lhs[node.label])
        expected.append(total)
    got = tree_loglik(lg, ts)
    assert torch.allclose(got, torch.tensor(expected, dtype=got.dtype), rtol=0, atol=1e-9)


def test_refine_runs_on_turkish_projection_trees(turkish_trees, tmp_path):
    train = tmp_path / "web.trees"
    train.write_text("".join(t.to_string() + "\n" for t in turkish_trees[:100]),
                     encoding="utf-8")
    # Held-out parsing is the slow part of a cycle; the likelihoods are what is checked here.
    result = refine(_refine_config(train, tmp_path / "run", ["data.heldout_fraction=0.1",
                                                             "output.parse_f1=false"]),
                    tmp_path / "run")
    metrics = [json.loads(line) for line in
               (tmp_path / "run" / "metrics.jsonl").read_text().splitlines()]
    assert [m["cycle"] for m in metrics] == [0, 1]
    assert result.grammar.num_fine() > len(result.grammar.symbols)  # some symbol was split
    # Split-merge improves the training likelihood (Petrov et al. 2006; EM never lowers it).
    assert metrics[1]["train/loglik"] > metrics[0]["train/loglik"]
