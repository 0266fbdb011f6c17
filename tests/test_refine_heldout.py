"""Refinement's held-out set in the log: when no held-out tree can be scored (said, not only
as nan in the metrics), and the held-out figure of every cycle at the end of a run, with the
best cycle's file named when the last is worse (figures made by hand, or read back from the
run's own metrics.jsonl)."""

from __future__ import annotations

import json
import math

from _treebank import refine_on_trees

from treewright.refine.run import _heldout_course
from treewright.runfolder import RunFolder

# Invented language: training trees put the subject first; the held-out trees put it last, a
# coarse rule (S -> VP NP) that training never saw, so every held-out tree is left out.
TRAIN = ["(S (NP (D ta) (N kip)) (VP (V orun) (N vesk)))",
         "(S (NP (D mo) (N lanu)) (VP (V dast) (N kip)))"]
HELD_OUT = ["(S (VP (V orun) (N kip)) (NP (D ta) (N lanu)))"]


def test_a_held_out_set_with_no_scorable_tree_is_said_in_the_log(tmp_path):
    run, _, _ = refine_on_trees(tmp_path, TRAIN * 3, HELD_OUT, em_iterations=1)
    log = (run / "refine.log").read_text(encoding="utf-8")
    assert "held-out: 1 of 1 trees use a coarse rule unseen in training" in log
    assert "none is left, so the held-out likelihood is not computed" in log
    last = json.loads((run / "metrics.jsonl").read_text().splitlines()[-1])
    # JSON has no NaN: metrics.jsonl writes it as the string "nan".
    assert last["heldout/trees"] == 0 and math.isnan(float(last["heldout/loglik"]))


# ---- the held-out course of a run, in its log ---------------------------------------------------

def _metrics(*figures):
    return [{"cycle": c, "heldout/loglik_per_word": ll} for c, ll in enumerate(figures)]


def test_the_course_names_the_best_cycle_when_the_last_is_worse(tmp_path):
    # Hand-made figures: cycle 1 is the best (-4.5); the last (-4.8) is 0.300 worse.
    folder = RunFolder(tmp_path, "refine")
    note = _heldout_course(_metrics(-5.0, -4.5, -4.8), folder)
    assert note.startswith("held-out log-likelihood per word by cycle: 0 -5.000, 1 -4.500, "
                           "2 -4.800. The refined grammar fits the held-out sentences worse "
                           "than cycle 1's did, by 0.300 nats a word")
    assert note.endswith(f"By this measure {tmp_path / 'cycle-1.pcfg'} is the better grammar "
                         "for new text")
    # The starting grammar best: its file is coarse.pcfg.
    assert str(tmp_path / "coarse.pcfg") in _heldout_course(_metrics(-5.0, -5.5), folder)


def test_the_course_says_so_when_the_last_is_best_and_skips_what_is_not_a_number(tmp_path):
    folder = RunFolder(tmp_path, "refine")
    assert _heldout_course(_metrics(-5.0, -4.5, -4.5), folder) == (
        "held-out log-likelihood per word by cycle: 0 -5.000, 1 -4.500, 2 -4.500; "
        "the last is the best")
    # nan (no scorable held-out tree), also as the string a resumed run's checkpoint holds.
    assert _heldout_course(_metrics(float("nan"), "nan"), folder) is None
    assert _heldout_course(_metrics("nan", -3.0), folder) == (
        "held-out log-likelihood per word by cycle: 1 -3.000; the last is the best")


def test_the_run_log_gives_the_course_of_its_metrics(tmp_path):
    run, _, _ = refine_on_trees(tmp_path, TRAIN * 3, TRAIN[:1], em_iterations=1)
    log = (run / "refine.log").read_text(encoding="utf-8")
    metrics = [json.loads(x) for x in (run / "metrics.jsonl").read_text().splitlines()]
    course = ", ".join(f"{m['cycle']} {m['heldout/loglik_per_word']:.3f}" for m in metrics)
    assert f"held-out log-likelihood per word by cycle: {course}" in log


def test_the_course_compares_from_the_cycle_it_is_told(tmp_path):
    # A text start whose grammar saw the held-out sentences compares from cycle 1: the
    # flattering cycle 0 (-5.0) is listed but not compared; of cycles 1-3, cycle 2 is best.
    folder = RunFolder(tmp_path, "refine")
    note = _heldout_course(_metrics(-5.0, -7.0, -6.5, -6.9), folder, compare_from=1)
    assert note.startswith("held-out log-likelihood per word by cycle: 0 -5.000, 1 -7.000, "
                           "2 -6.500, 3 -6.900. The refined grammar fits the held-out sentences "
                           "worse than cycle 2's did, by 0.400 nats a word")
    assert _heldout_course(_metrics(-5.0, -7.0, -6.5), folder, compare_from=1).endswith(
        "; the last is the best of the cycles from 1 on")
