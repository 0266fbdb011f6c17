"""The memory budget of score, parse, evaluate and report, one output line per input line, the
digits score prints, and progress on a terminal."""

from __future__ import annotations

import io
import json
import math
from pathlib import Path

import numpy
import pytest
import torch

from treewright.budget import (DEFAULT_BUDGET_MB, MB, longest_within, plan_budget,
                               sentence_bytes)
from treewright.cli import main
from treewright.engine.memory import inside_outside_bytes
from treewright.grammar import load_grammar
from treewright.tracking import terminal_progress

ROOT = Path(__file__).resolve().parent.parent
TEXTBOOK = ROOT / "src" / "treewright" / "data" / "examples" / "astronomers.pcfg"
SENTENCE = "astronomers saw stars with ears"
LONG = " ".join([SENTENCE] * 40)  # 200 words
# Published worked example (Manning & Schütze 1999, ch. 11; values from memory): p(sentence) =
# 0.0015876; its most probable tree attaches the PP to the noun, p = 0.0009072.
P_SENTENCE, P_BEST = 0.0015876, 0.0009072
BEST_TREE = "(S (NP astronomers) (VP (V saw) (NP (NP stars) (PP (P with) (NP ears)))))"


@pytest.fixture(scope="module")
def grammar():
    return load_grammar(TEXTBOOK)


def budget_for(grammar, words: int, dtype) -> float:
    """A budget (MiB) that fits a sentence of `words` words and nothing longer."""
    return sentence_bytes(grammar, words, dtype) / MB


def test_cli_default_is_the_library_default():
    from treewright.cli.common import DEFAULT_BUDGET_MB as written_out
    assert written_out == DEFAULT_BUDGET_MB


@pytest.mark.parametrize("budget_mb", [0.5, 12.5, 20.0, 100.0, 2048.0])
def test_longest_within_matches_a_linear_scan(grammar, budget_mb):
    # Brute force: the largest n whose estimate fits, by trying every n in turn.
    n = 0
    while sentence_bytes(grammar, n + 1) <= budget_mb * MB:
        n += 1
    assert longest_within(grammar, budget_mb) == n


def test_every_planned_call_fits_and_only_the_long_are_left_out(grammar):
    lengths = [3, 5, 200, 5, 1, 40, 7]
    budget = budget_for(grammar, 40, torch.float32) * 1.5
    plan = plan_budget(grammar, lengths, budget, batch_size=4)
    # Reference: the estimate evaluated for each sentence and each call directly.
    assert plan.over == [i for i, n in enumerate(lengths) if sentence_bytes(grammar, n) > budget * MB]
    assert plan.over == [2]
    assert sorted(i for g in plan.groups for i in g) == [0, 1, 3, 4, 5, 6]
    for group in plan.groups:
        assert len(group) <= 4
        # Reference: engine.memory's estimate of the whole call.
        assert inside_outside_bytes(len(group), max(lengths[i] for i in group),
                                    len(grammar.nonterminals), len(grammar.preterminals)) <= \
            budget * MB
    assert any(len(g) > 1 for g in plan.groups)  # short sentences share a call
    with pytest.raises(ValueError):
        plan_budget(grammar, lengths, 0.0)


def test_score_keeps_an_over_budget_line_and_names_it(grammar, tmp_path, capsys):
    text = tmp_path / "in.txt"
    text.write_text(f"{SENTENCE}\n{LONG}\n{SENTENCE}\n")
    budget = budget_for(grammar, 5, torch.float32)
    assert main(["score", str(TEXTBOOK), str(text), "--memory-budget", f"{budget:.6f}"]) == 0
    captured = capsys.readouterr()
    records = [json.loads(x) for x in captured.out.splitlines()]
    assert [r.get("line") for r in records[:-1]] == [1, 2, 3]
    assert records[1]["over_memory_budget"] is True and records[1]["logprob"] is None
    assert len(records[1]["tokens"]) == 200
    for r in (records[0], records[2]):
        assert r["logprob"] == pytest.approx(math.log(P_SENTENCE), rel=1e-6)
    assert records[-1]["summary"]["over_memory_budget"] == 1
    assert records[-1]["summary"]["parsed"] == 2
    assert f"{text}, line 2: not scored: 200 words" in captured.err
    text.write_text(f"{LONG}\n")  # nothing scored: no log-likelihood rather than a sum of 0
    assert main(["score", str(TEXTBOOK), str(text), "--memory-budget", f"{budget:.6f}"]) == 0
    summary = json.loads(capsys.readouterr().out.splitlines()[-1])["summary"]
    assert summary["log_likelihood"] is None and summary["perplexity"] is None


def test_score_prints_the_digits_float32_supports(tmp_path, capsys):
    text = tmp_path / "in.txt"
    text.write_text(SENTENCE + "\n")
    assert main(["score", str(TEXTBOOK), str(text)]) == 0
    record = json.loads(capsys.readouterr().out.splitlines()[0])
    printed = json.dumps(record["logprob"])
    # Reference: numpy's shortest decimal that reads back as the same float32.
    assert printed == str(numpy.float32(math.log(P_SENTENCE)))
    assert len(printed.lstrip("-").replace(".", "").lstrip("0")) <= 9  # float32: <= 9 digits
    assert main(["score", str(TEXTBOOK), str(text), "--float64"]) == 0
    record = json.loads(capsys.readouterr().out.splitlines()[0])
    assert record["logprob"] == pytest.approx(math.log(P_SENTENCE), rel=1e-9)


def test_parse_keeps_one_output_line_per_input_line(grammar, tmp_path, capsys):
    text = tmp_path / "in.txt"
    lines = [SENTENCE, "", "   \t", LONG, "unknown words", SENTENCE, ""]
    text.write_text("\n".join(lines) + "\n")
    budget = budget_for(grammar, 5, torch.float64)
    assert main(["parse", str(TEXTBOOK), str(text), "--scores",
                 "--memory-budget", f"{budget:.6f}"]) == 0
    captured = capsys.readouterr()
    out = captured.out.split("\n")
    assert out[-1] == "" and len(out) - 1 == len(lines)  # reference: the input's line count
    out = out[:-1]
    best, logp, _ = out[0].split("\t")
    assert best == BEST_TREE and float(logp) == pytest.approx(math.log(P_BEST), rel=1e-9)
    assert out[1] == "" and out[2] == "" and out[6] == ""
    assert out[3].startswith("(NOPARSE astronomers saw") and out[3].split("\t")[1] == "nan"
    assert out[4].startswith("(NOPARSE unknown words)")
    assert out[5].split("\t")[0] == BEST_TREE
    assert f"{text}, line 4: not parsed: 200 words" in captured.err
    assert f"{text}, line 5: no parse" in captured.err


@pytest.mark.parametrize("decoder", ["viterbi", "mbr", "max-rule-product"])
def test_parse_gives_the_same_lines_whatever_the_batch_size(tmp_path, capsys, decoder):
    # The default batch (32 through a rule tensor) against one sentence a call, with and
    # without --scores (which alone computes the trees' log-probabilities): the same lines.
    text = tmp_path / "in.txt"
    text.write_text("\n".join([SENTENCE, "astronomers saw ears", "stars saw astronomers with "
                               "stars", SENTENCE]) + "\n")
    outputs = []
    for batch in ([], ["--batch-size", "1"]):
        for scores in ([], ["--scores"]):
            assert main(["parse", str(TEXTBOOK), str(text), "--decoder", decoder,
                         *batch, *scores]) == 0
            outputs.append(capsys.readouterr().out.splitlines())
    assert outputs[0] == outputs[2] and outputs[1] == outputs[3]
    assert [line.split("\t")[0] for line in outputs[1]] == outputs[0]
    if decoder == "viterbi":   # the worked example's most probable tree
        assert outputs[0][0] == BEST_TREE and outputs[0][3] == BEST_TREE
    assert main(["parse", str(TEXTBOOK), str(text), "--batch-size", "0"]) == 1
    assert "--batch-size must be at least 1, not 0" in capsys.readouterr().err


def test_parse_from_stdin_keeps_blank_lines(tmp_path, capsys, monkeypatch):
    monkeypatch.setattr("sys.stdin", io.StringIO(f"\n{SENTENCE}\n \n"))
    assert main(["parse", str(TEXTBOOK), "-"]) == 0
    assert capsys.readouterr().out == f"\n{BEST_TREE}\n\n"


def test_stdin_refuses_conllu_and_warns_of_trees(capsys, monkeypatch):
    # Standard input is raw text. A CoNLL-U block there would become sentences of ids and
    # columns, so it is refused, naming the first word line (line 2, after the comment).
    words = SENTENCE.split()
    block = "# sent_id = 1\n" + "".join(f"{k}\t{w}\t_\t_\t_\t_\t_\t_\t_\t_\n"
                                      for k, w in enumerate(words, start=1))
    monkeypatch.setattr("sys.stdin", io.StringIO(block))
    assert main(["parse", str(TEXTBOOK), "-"]) != 0
    err = capsys.readouterr().err
    assert "<stdin>, line 2" in err and "give the CoNLL-U file's path" in err
    # A bracketed tree is still read as raw text (a sentence may start with a parenthesis),
    # with a warning that names its line; its brackets are words the grammar does not have.
    monkeypatch.setattr("sys.stdin", io.StringIO(f"\n{BEST_TREE}\n"))
    assert main(["parse", str(TEXTBOOK), "-"]) == 0
    captured = capsys.readouterr()
    assert "<stdin>, line 2: this looks like a bracketed tree" in captured.err
    assert captured.out.splitlines()[1].startswith("(NOPARSE")
    # Raw text that only starts with a parenthesis is read without a word.
    monkeypatch.setattr("sys.stdin", io.StringIO(f"( {SENTENCE}\n"))
    main(["parse", str(TEXTBOOK), "-"])
    assert "looks like" not in capsys.readouterr().err


def test_evaluate_and_report_leave_out_and_name_the_long_sentence(grammar, tmp_path, capsys):
    (tmp_path / "text.txt").write_text(f"{SENTENCE}\n{LONG}\n")
    (tmp_path / "t.trees").write_text(BEST_TREE + "\n")
    out = tmp_path / "scores.json"
    budget = budget_for(grammar, 5, torch.float32)
    assert main(["evaluate", str(tmp_path / "t.trees"), str(tmp_path / "t.trees"),
                 "--grammar", str(TEXTBOOK), "--text", str(tmp_path / "text.txt"),
                 "--json", str(out), "--memory-budget", f"{budget:.6f}"]) == 0
    assert "over the memory budget" in capsys.readouterr().out
    scores = json.loads(out.read_text())
    assert scores["likelihood"]["sentences"] == 1
    assert scores["likelihood"]["logprob_per_word"] == pytest.approx(math.log(P_SENTENCE) / 5,
                                                                     rel=1e-5)
    assert "lines 2" in scores["likelihood_note"]

    run = tmp_path / "run"
    run.mkdir()
    (tmp_path / "gold.trees").write_text(
        f"{BEST_TREE}\n(S (X {' '.join(f'(W {w})' for w in LONG.split())}))\n")
    budget = budget_for(grammar, 5, torch.float64)
    page = tmp_path / "r.html"
    assert main(["report", str(run), "--grammar", str(TEXTBOOK), "--gold",
                 str(tmp_path / "gold.trees"), "--out", str(page),
                 "--memory-budget", f"{budget:.6f}", "--heatmap-sentence", "2"]) == 0
    html = page.read_text()
    assert "1 sentences over the memory budget" in html and "line 2" in html
    assert "Sentence 2 (" in html and "is over the memory budget" in html


class _Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


def test_progress_shows_on_a_terminal_only(tmp_path, capsys, monkeypatch):
    with terminal_progress(3, "x", stream=io.StringIO()) as progress:
        progress.update(3)  # a pipe or file: nothing written (the object is silent)
    text = tmp_path / "in.txt"
    text.write_text(f"{SENTENCE}\n{SENTENCE}\n")
    terminal = _Terminal()
    monkeypatch.setattr("sys.stderr", terminal)
    assert main(["parse", str(TEXTBOOK), str(text)]) == 0
    # The bar's final state, redrawn in place with a carriage return (tracking.Progress).
    assert "\rparse: 100%" in terminal.getvalue() and "2/2 sentences" in terminal.getvalue()
    monkeypatch.undo()
    capsys.readouterr()
    assert main(["parse", str(TEXTBOOK), str(text)]) == 0
    assert capsys.readouterr().err == ""  # not a terminal: no progress at all
