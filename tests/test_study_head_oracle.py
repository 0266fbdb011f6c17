"""scripts/study_head_oracle.py: the best heads within a binary tree, against enumeration of
every head choice (each binary node headed by its left or its right child), and the script end
to end on a tiny lexicalized run.

References: the enumeration written in this file; the chain baselines from their definition (a
left-branching tree with every head on the right gives each word the next word as head, the
right chain: common practice)."""

from __future__ import annotations

import importlib.util
import itertools
import random
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO / "scripts"))
_spec = importlib.util.spec_from_file_location("study_head_oracle",
                                               REPO / "scripts" / "study_head_oracle.py")
study = importlib.util.module_from_spec(_spec)
_spec.loader.exec_module(study)


def _nodes(shape):
    """The binary nodes of a shape, in a fixed order (pre-order); each is distinct, as its
    leaves are."""
    if isinstance(shape, int):
        return []
    return [shape] + _nodes(shape[0]) + _nodes(shape[1])


def _heads_of(shape, sides: dict) -> list[int]:
    """Per word (1-based heads, 0 for the root), the dependency tree that the head side chosen
    at each node gives: the non-head child's head word depends on the head child's."""
    n = len(_leaves(shape))
    heads = [0] * n

    def head(node):
        if isinstance(node, int):
            return node + 1
        left, right = head(node[0]), head(node[1])
        if sides[node] == 0:
            heads[right - 1] = left
            return left
        heads[left - 1] = right
        return right

    heads[head(shape) - 1] = 0
    return heads


def _leaves(shape):
    return [shape] if isinstance(shape, int) else _leaves(shape[0]) + _leaves(shape[1])


def _random_shape(words: list[int], rng: random.Random):
    if len(words) == 1:
        return words[0]
    cut = rng.randint(1, len(words) - 1)
    return (_random_shape(words[:cut], rng), _random_shape(words[cut:], rng))


def _random_tree_heads(n: int, rng: random.Random) -> list[int]:
    """Random gold heads: each word but one root attached to an earlier-placed word, so the
    result is a tree (not necessarily projective)."""
    order = list(range(1, n + 1))
    rng.shuffle(order)
    heads = [0] * n
    for k, word in enumerate(order[1:], start=1):
        heads[word - 1] = rng.choice(order[:k])
    return heads


def test_best_heads_within_equals_enumeration_of_every_head_choice():
    rng = random.Random(3)
    for _ in range(150):
        n = rng.randint(1, 8)
        shape = _random_shape(list(range(n)), rng)
        gold = _random_tree_heads(n, rng)
        nodes = _nodes(shape)
        enumerated = max(
            sum(h == g for h, g in zip(_heads_of(shape, dict(zip(nodes, sides))), gold))
            for sides in itertools.product((0, 1), repeat=len(nodes)))
        assert study.best_heads_within(shape, gold) == enumerated


def test_branching_trees_hold_the_chains():
    # Within the left-branching tree, heads on the right give the right chain; so for gold
    # heads that are the right chain, the best is every word. Within the right-branching tree
    # the right chain cannot be had: at (0 (1 2)) with gold 0 -> 1 -> 2, word 0 can only
    # depend on the head of (1 2), which is 1 only if 1 heads 2's node, and then 1 -> 2 is lost.
    right_chain = [2, 3, 0]
    assert study.branching(3, left=True) == ((0, 1), 2)
    assert study.branching(3, left=False) == (0, (1, 2))
    assert study.best_heads_within(study.branching(3, left=True), right_chain) == 3
    assert study.best_heads_within(study.branching(3, left=False), right_chain) == 2
    assert study.best_heads_within(study.branching(1, left=True), [0]) == 1


def test_script_end_to_end_on_a_tiny_lexicalized_run(tmp_path, capsys):
    from treewright.train import load_train_config, train
    bench = pytest.importorskip("bench_induction")
    data = bench.generated_data("head-final", tmp_path, 60, 12, 10, 0)
    (tmp_path / "train.txt").write_text("\n".join(" ".join(s) for s in data.train_tokens) + "\n",
                                        encoding="utf-8")
    cfg = load_train_config(REPO / "configs" / "induce_lexicalized.yaml", [
        f"data.train={tmp_path / 'train.txt'}", "model.nonterminals=4", "model.preterminals=6",
        "model.head_classes=4", "model.embedding_dim=8", "train.epochs=1",
        "constraints.brackets_from=null", f"output.run_dir={tmp_path / 'run'}"])
    train(cfg, tmp_path / "run", stream=open(tmp_path / "log", "w", encoding="utf-8"))
    out = study.main(["--data", "head-final", "--train-sentences", "60", "--test-sentences",
                      "12", "--max-length", "10", str(tmp_path / "run")])
    figures = out["runs"][str(tmp_path / "run")]
    assert 0 <= figures["directed"] <= 1 and 0 <= figures["bound"] <= 1
    # The right chain is a head choice within the left-branching trees, and the left chain
    # within the right-branching ones (common practice: the definitions of the chains), so
    # those bounds are at least the chains' directed accuracy on the same words.
    from treewright.evaluation import evaluate_attachment
    chains = evaluate_attachment(None, data.evals[0].dependencies).systems
    assert out["words"] == chains["right_chain"].words
    assert out["left-branching"] >= chains["right_chain"].directed - 1e-12
    assert out["right-branching"] >= chains["left_chain"].directed - 1e-12
    assert "best heads within its own trees" in capsys.readouterr().out


def test_restrict_drops_leaves_and_collapses_their_nodes():
    # ((0 1) (2 3)) without word 1 and word 3: (0 2), renumbered 0 -> 0, 2 -> 1.
    assert study.restrict(((0, 1), (2, 3)), {0: 0, 2: 1}) == (0, 1)
    # Without word 2 alone: ((0 1) 3) renumbered.
    assert study.restrict(((0, 1), (2, 3)), {0: 0, 1: 1, 3: 2}) == ((0, 1), 2)
    assert study.restrict((0, 1), {}) is None


def test_a_sentence_of_punctuation_alone_has_no_scored_word():
    from treewright.evaluation import BracketConventions, Dependencies
    kept, gold = study.scored_gold(Dependencies((".",), (0,), ("PUNCT",)), BracketConventions())
    assert (kept, gold) == ([], [])
    # ko brosk . : the "." is not scored; brosk is the root, ko depends on it.
    kept, gold = study.scored_gold(Dependencies(("ko", "brosk", "."), (2, 0, 2),
                                                ("DET", "N", "PUNCT")), BracketConventions())
    assert (kept, gold) == ([0, 1], [2, 0])
