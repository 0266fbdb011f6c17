"""An interrupted refinement continued with `refine --resume` ends with the uninterrupted run's
grammar, bit for bit, from both starting points (trees and raw text).

Reference: the same config run once without interruption; float64 throughout, so the resumed
run must give the same bytes (the refiner's arithmetic does not depend on where it restarted).
The data are sampled from a fine grammar written for test_refine.py.
"""

from __future__ import annotations

import json

import pytest
import torch

import treewright.refine.run as refine_run
from test_refine import FINE
from treewright.cli import main
from treewright.errors import InputError
from treewright.grammar import parse_grammar
from treewright.inference import generate
from treewright.refine import estimate_coarse, load_refine_config, refine, refine_resume
from treewright.refine.text import project_labels


@pytest.fixture(scope="module")
def corpora(tmp_path_factory):
    folder = tmp_path_factory.mktemp("data")
    trees = [project_labels(t) for t in generate(parse_grammar(FINE), 120, seed=5)]
    treebank = folder / "trees.txt"
    treebank.write_text("".join(t.to_string() + "\n" for t in trees), encoding="utf-8")
    text = folder / "text.txt"
    text.write_text("".join(" ".join(t.leaves()) + "\n" for t in trees), encoding="utf-8")
    coarse = folder / "coarse.pcfg"
    estimate_coarse(trees).to_grammar(torch.float64).save(coarse)
    return {"treebank": treebank, "text": text, "grammar": coarse}


def _config(corpora, start: str, run_dir):
    data = [f"data.start={start}", "data.heldout_fraction=0.2"]
    if start == "treebank":
        data.append(f"data.train={corpora['treebank']}")
    else:
        data += [f"data.train={corpora['text']}", f"data.grammar={corpora['grammar']}"]
    return load_refine_config(None, data + [
        "refine.cycles=3", "refine.em_iterations=3", "refine.smoothed_iterations=1",
        "output.f1_max_sentences=3", "output.tensorboard=false", "output.stdout_metrics=false",
        f"output.run_dir={run_dir}"])


def _metrics(run_dir) -> list[dict]:
    lines = (run_dir / "metrics.jsonl").read_text(encoding="utf-8").splitlines()
    records = [json.loads(line) for line in lines]
    for r in records:  # wall-clock fields differ between any two runs
        r.pop("time")
        r.pop("seconds", None)
    return records


@pytest.mark.parametrize("start", ["treebank", "text"])
def test_an_interrupted_refinement_resumes_to_the_uninterrupted_grammar(corpora, start,
                                                                       tmp_path, monkeypatch):
    whole = tmp_path / "whole"
    refine(_config(corpora, start, whole), whole)

    cut = tmp_path / "cut"
    name = "tree_cycle" if start == "treebank" else "text_cycle"
    real = getattr(refine_run, name)
    calls = []

    def interrupted_in_cycle_two(*args, **kwargs):
        calls.append(1)
        if len(calls) == 2:
            raise KeyboardInterrupt
        return real(*args, **kwargs)

    monkeypatch.setattr(refine_run, name, interrupted_in_cycle_two)
    with pytest.raises(KeyboardInterrupt):
        refine(_config(corpora, start, cut), cut)
    monkeypatch.setattr(refine_run, name, real)
    assert not (cut / "grammar.pcfg").exists() and (cut / "cycle-1.pcfg").exists()

    result = refine_resume(cut)
    assert (cut / "grammar.pcfg").read_bytes() == (whole / "grammar.pcfg").read_bytes()
    for c in (1, 2, 3):
        assert (cut / f"cycle-{c}.pcfg").read_bytes() == (whole / f"cycle-{c}.pcfg").read_bytes()
    assert (cut / "summary.json").read_text() == (whole / "summary.json").read_text()
    # One metrics line per cycle, 0 to 3, none repeated or lost, equal to the reference's.
    assert _metrics(cut) == _metrics(whole)
    assert [m["cycle"] for m in result.metrics] == [0, 1, 2, 3]
    assert "resuming after cycle 1 of 3" in (cut / "refine.log").read_text()


def test_resume_refuses_changed_data_and_a_new_run_refuses_a_used_folder(corpora, tmp_path,
                                                                         capsys):
    run = tmp_path / "run"
    cfg = _config(corpora, "treebank", run)
    refine(cfg, run)
    with pytest.raises(InputError, match="already holds a refinement checkpoint"):
        refine(cfg, run)
    # The saved config names the training file; a different corpus there gives another
    # coarse grammar, which the checkpoint's latent grammar does not fit.
    original = corpora["treebank"].read_text(encoding="utf-8")
    try:
        corpora["treebank"].write_text("(S (NP (D ta) (N mira)) (VP (V gash) (NP (D ko) "
                                       "(N rab))))\n" * 30, encoding="utf-8")
        with pytest.raises(InputError, match="no longer give the coarse grammar"):
            refine_resume(run)
    finally:
        corpora["treebank"].write_text(original, encoding="utf-8")
    with pytest.raises(InputError, match="no refinement checkpoint"):
        refine_resume(tmp_path / "elsewhere")
    # The command line: --resume takes no config, and finishes a finished run at once.
    assert main(["refine", "--resume", str(run), "refine.cycles=5"]) == 1
    assert "takes the config saved" in capsys.readouterr().err
    assert main(["refine", "--resume", str(run)]) == 0
    assert capsys.readouterr().out.strip().endswith("grammar.pcfg")


def test_the_caller_chooses_the_held_out_parser(corpora, tmp_path):
    # The held-out parser is the caller's: called once per report (cycles 0 to 3) with the
    # first output.f1_max_sentences held-out sentences. A parser that finds no tree predicts
    # no brackets, so labeled precision, recall and F1 are 0 (common practice: an empty
    # prediction scores 0).
    calls = []

    def no_trees(lg, words):
        calls.append(len(words))
        return [None] * len(words)

    run = tmp_path / "run"
    result = refine(_config(corpora, "treebank", run), run, heldout_parser=no_trees)
    assert calls == [3, 3, 3, 3]
    for m in result.metrics:
        assert (m["heldout/labeled_precision"], m["heldout/labeled_recall"],
                m["heldout/labeled_f1"]) == (0.0, 0.0, 0.0)


def test_a_grammar_whose_chart_layout_is_over_the_cap_still_gets_its_f1(
        corpora, tmp_path, monkeypatch):
    # max-rule-product never makes its chart pass's layout over decode.MRP_LAYOUT_AT_MOST
    # (here any): every held-out sentence takes the pruned pass, which is exact, so each
    # cycle's held-out F1 is that of the same run under the default cap.
    import treewright.decode as decode_module
    free = refine(_config(corpora, "treebank", tmp_path / "free"), tmp_path / "free")
    monkeypatch.setattr(decode_module, "MRP_LAYOUT_AT_MOST", 0)
    capped = refine(_config(corpora, "treebank", tmp_path / "capped"), tmp_path / "capped")
    f1 = [[m["heldout/labeled_f1"] for m in r.metrics] for r in (free, capped)]
    assert f1[0] == f1[1] and len(f1[0]) == 4 and max(f1[0]) > 0


def test_a_held_out_parser_that_refuses_the_grammar_ends_its_run_without_that_f1(
        corpora, tmp_path):
    # A decoder that cannot take the grammar raises InputError: the run still ends, with its
    # grammar and every other metric, and its log says why the cycles have no held-out F1.
    def refuse(lg, words):
        raise InputError("this decoder cannot take the grammar")

    run = tmp_path / "run"
    result = refine(_config(corpora, "treebank", run), run, heldout_parser=refuse)
    assert [m["cycle"] for m in result.metrics] == [0, 1, 2, 3]
    assert all("heldout/labeled_f1" not in m and "heldout/loglik" in m for m in result.metrics)
    assert (run / "grammar.pcfg").exists()
    log = (run / "refine.log").read_text(encoding="utf-8")
    assert log.count("held-out labeled F1 not measured: this decoder cannot take the "
                     "grammar") == 4


def test_a_cycle_that_would_not_fit_in_memory_stops_the_run_with_its_grammar_saved(
        corpora, tmp_path, monkeypatch):
    # The system's free memory as refine reads it: ample before cycle 1, none before cycle 2.
    # The run stops before cycle 2 with a clear error, and the refined grammar it leaves is
    # cycle 1's, byte for byte, with cycles 0 and 1 reported.
    free = iter([2 ** 60, 0])
    monkeypatch.setattr(refine_run, "available_bytes", lambda: next(free))
    run = tmp_path / "run"
    with pytest.raises(InputError, match=r"cycle 2 of 3 would hold its [\d,]+ coarse rules over "
                                         r"4\*\*3 subcategory slots each.*The refined grammar "
                                         r"is that of cycle 1"):
        refine(_config(corpora, "treebank", run), run)
    assert (run / "grammar.pcfg").read_bytes() == (run / "cycle-1.pcfg").read_bytes()
    assert [m["cycle"] for m in _metrics(run)] == [0, 1]
    assert "stopped: cycle 2 of 3 would hold" in (run / "refine.log").read_text(encoding="utf-8")
    # Where the system does not say how much is free, nothing is checked.
    monkeypatch.setattr(refine_run, "available_bytes", lambda: None)
    other = tmp_path / "other"
    assert [m["cycle"] for m in refine(_config(corpora, "treebank", other), other).metrics] \
        == [0, 1, 2, 3]
