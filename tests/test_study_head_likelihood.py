"""scripts/study_head_likelihood.py: the constituents a dependency tree allows, against
brute-force enumeration of every lexicalized binary tree (tests/_brute.py), and one tiny run
end to end.

References: the enumeration; the fact that a sum over fewer derivations is no larger (the
likelihood with the gold heads fixed is at most the likelihood with nothing fixed: common
practice); the chain baselines recomputed here from their definition (every word attached to
its neighbour)."""

from __future__ import annotations

import importlib.util
import math
from pathlib import Path

import pytest

from _brute import lexicalized_trees
from treewright.engine.lexicalized import heads_from_spans

REPO = Path(__file__).resolve().parents[1]
_spec = importlib.util.spec_from_file_location("study_head_likelihood",
                                               REPO / "scripts" / "study_head_likelihood.py")
study = importlib.util.module_from_spec(_spec)
_spec.loader.exec_module(study)


def _enumerated(heads: tuple[int, ...]) -> dict[tuple[int, int], set[int]]:
    """(start, end) -> heads of that span, over every binary lexicalized tree whose dependency
    tree is `heads` (spans of two or more words)."""
    n = len(heads)
    seen: dict[tuple[int, int], set[int]] = {}
    for _, _, nodes, leaves in lexicalized_trees(n, 1, 1):
        spans = [(i, j, a, h) for i, j, a, h, *_ in nodes] + [(i, i + 1, k, i) for i, k in leaves]
        if tuple(heads_from_spans(spans, n)) != heads:
            continue
        for i, j, _, h, *_ in nodes:
            seen.setdefault((i, j), set()).add(h)
    return seen


@pytest.mark.parametrize("heads", [
    (0, 1, 2, 3, 4),          # a right-going chain
    (2, 0, 2, 5, 2),          # a head with dependents on both sides
    (3, 3, 0, 3),             # two left dependents, one right
    (0, 3, 1, 3, 4, 1),       # mixed
])
def test_allowed_spans_are_those_of_every_tree_with_the_gold_heads(heads):
    allowed = study.allowed_heads(heads)
    reference = _enumerated(heads)
    assert reference, "the gold tree must be projective"
    # Every span some consistent tree has, with its one head; and no other span.
    assert {span: {h} for span, h in allowed.items()} == reference


def _tiny_treebank(tmp_path: Path) -> Path:
    """Two head-final sentences, six times each (12 sentences, 30 words)."""
    conllu = ("1\tka\t_\tN\t_\t_\t2\tobj\t_\t_\n2\tvo\t_\tV\t_\t_\t0\troot\t_\t_\n\n"
              "1\tsi\t_\tN\t_\t_\t3\tnsubj\t_\t_\n2\tka\t_\tN\t_\t_\t3\tobj\t_\t_\n"
              "3\tvo\t_\tV\t_\t_\t0\troot\t_\t_\n\n")
    path = tmp_path / "tiny.conllu"
    path.write_text(conllu * 6, encoding="utf-8")
    return path


def test_a_tiny_run_reports_both_conditions(tmp_path):
    path = _tiny_treebank(tmp_path)
    out = tmp_path / "study.json"
    result = study.main([str(path), str(path), "--epochs", "2", "--classes", "2",
                         "--nonterminals", "2", "--preterminals", "2", "--dim", "8",
                         "--out", str(out)])
    assert out.exists()
    assert set(result["conditions"]) == {"free", "gold"}
    assert result["counts"]["train_sentences"] == 12
    for condition in result["conditions"].values():
        assert len(condition["training_curve"]) == 2
        test = condition["test"]
        assert test["words_scored"] == 30
        # Fixing the heads can only remove derivations.
        assert test["gold_heads_log_likelihood_per_word"] <= \
            test["log_likelihood_per_word"] + 1e-9
        assert math.isfinite(test["log_likelihood_per_word"])
        chains = test["attachment"]
        # Left chain: each word to the word before it, the first to the root: no word of
        # either sentence (their heads lie to the right, the root is the last word).
        assert chains["left_chain"]["directed"] == 0.0
        # Right chain: each word to the word after it, the last to the root: every word of
        # both sentences but "si" (whose head is vo, two words on): 4 of 5.
        assert math.isclose(chains["right_chain"]["directed"], 4 / 5)
        # NED (hand-worked). Right chain: si -> ka is neither si's gold head vo, its gold
        # grandparent (the root) nor a reversed arc (ka's gold head is vo): 4 of 5 again. Left
        # chain: ka -> root (sentence 1) and si -> root (sentence 2) are their gold
        # grandparents, vo -> ka (both sentences) is ka's gold arc reversed; ka -> si is none
        # of the three: 4 of 5.
        assert math.isclose(chains["right_chain"]["ned"], 4 / 5)
        assert math.isclose(chains["left_chain"]["ned"], 4 / 5)
    # With --tags the model reads the UPOS column: two tags and the unknown word.
    tagged = study.main([str(path), str(path), "--epochs", "1", "--classes", "2",
                         "--nonterminals", "2", "--preterminals", "2", "--dim", "8", "--tags"])
    assert result["counts"]["vocabulary"] == 4 and tagged["counts"]["vocabulary"] == 3
    # --condition trains one of the two, from the same start as the run with both: the same
    # training curve (same seed, same batches) and the same held-out scores.
    alone = study.main([str(path), str(path), "--epochs", "2", "--classes", "2",
                        "--nonterminals", "2", "--preterminals", "2", "--dim", "8",
                        "--condition", "gold"])
    assert set(alone["conditions"]) == {"gold"}
    assert alone["conditions"]["gold"] == result["conditions"]["gold"]


def test_annealing_raises_beta_linearly_to_one_and_changes_training():
    # The schedule (Smith & Eisner 2004 raise beta to 1; linear here): from --anneal-from at
    # the first update to 1 after --anneal-epochs epochs, 1 throughout when it is 0.
    class Args:
        anneal_from, anneal_epochs = 0.4, 2
    steps_per_epoch = 10
    assert study.annealing_exponent(0, steps_per_epoch, Args) == pytest.approx(0.4)
    assert study.annealing_exponent(10, steps_per_epoch, Args) == pytest.approx(0.7)
    assert study.annealing_exponent(20, steps_per_epoch, Args) == 1.0
    assert study.annealing_exponent(35, steps_per_epoch, Args) == 1.0
    Args.anneal_epochs = 0
    assert study.annealing_exponent(0, steps_per_epoch, Args) == 1.0


def test_annealing_trains_another_model_from_the_same_start(tmp_path):
    path = _tiny_treebank(tmp_path)
    common = [str(path), str(path), "--epochs", "2", "--classes", "2", "--nonterminals", "2",
              "--preterminals", "2", "--dim", "8", "--condition", "free"]
    plain = study.main(common)["conditions"]["free"]
    off = study.main(common + ["--anneal-from", "0.5"])["conditions"]["free"]
    annealed = study.main(common + ["--anneal-from", "0.5", "--anneal-epochs", "1"])
    assert off == plain          # no annealing epochs: beta stays 1
    curve = annealed["conditions"]["free"]["training_curve"]
    assert curve != plain["training_curve"]
    assert annealed["options"]["anneal_from"] == 0.5 and all(map(math.isfinite, curve))
