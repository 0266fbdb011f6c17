"""The published worked example: Manning & Schuetze (1999), Foundations of Statistical Natural
Language Processing, chapter 11, "astronomers saw stars with ears". The values p(sentence) =
0.0015876 and the two trees' 0.0009072 and 0.0006804 are written here from memory."""

from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path

import pytest
import torch

from treewright.grammar import load_grammar
from treewright.inference import posterior_samples, score, tree_logprob, viterbi_parse

GRAMMAR = (Path(__file__).resolve().parent.parent / "src" / "treewright" / "data"
          / "examples" / "astronomers.pcfg")
SENTENCE = "astronomers saw stars with ears".split()


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
def test_sentence_probability(dtype):
    (s,) = score(load_grammar(GRAMMAR), [SENTENCE], dtype=dtype)
    assert math.exp(s.logprob) == pytest.approx(0.0015876, rel=1e-6)


def test_the_two_trees_and_the_viterbi_tree():
    grammar = load_grammar(GRAMMAR)
    ((tree, logp),) = viterbi_parse(grammar, [SENTENCE])
    assert math.exp(logp) == pytest.approx(0.0009072, rel=1e-9)
    assert tree.to_string() == ("(S (NP astronomers) (VP (V saw) (NP (NP stars) "
                                "(PP (P with) (NP ears)))))")
    # The sentence has exactly two trees: every posterior sample is one of them.
    samples = posterior_samples(grammar, [SENTENCE], 200, seed=3)[0]
    probs = {t.to_string(): math.exp(tree_logprob(grammar, t)) for t in samples}
    assert sorted(probs.values()) == pytest.approx([0.0006804, 0.0009072], rel=1e-9)
    # Their share of the draws follows the posterior 0.5714 / 0.4286 (binomial, 200 draws).
    share = sum(t.to_string() == tree.to_string() for t in samples) / len(samples)
    assert abs(share - 0.0009072 / 0.0015876) < 0.12


def run_cli(*args, stdin=""):
    return subprocess.run([sys.executable, "-m", "treewright", *args], input=stdin,
                          capture_output=True, text=True)


def test_score_and_parse_commands_on_the_textbook_grammar():
    out = run_cli("score", str(GRAMMAR), "-", stdin=" ".join(SENTENCE) + "\nstars saw comets\n")
    assert out.returncode == 0, out.stderr
    lines = [json.loads(x) for x in out.stdout.splitlines()]
    assert math.exp(lines[0]["logprob"]) == pytest.approx(0.0015876, rel=1e-5)
    assert lines[1]["parsed"] is False and lines[1]["unknown"] == ["comets"]
    summary = lines[2]["summary"]
    assert summary["sentences"] == 2 and summary["unparsed"] == 1
    assert summary["perplexity"] == pytest.approx(0.0015876 ** (-1 / 5), rel=1e-5)

    out = run_cli("parse", str(GRAMMAR), "-", stdin=" ".join(SENTENCE) + "\nstars saw comets\n")
    assert out.returncode == 0, out.stderr
    trees = out.stdout.splitlines()
    assert trees[0].startswith("(S (NP astronomers) (VP (V saw)")
    assert trees[1] == "(NOPARSE stars saw comets)"
    assert "line 2: no parse (unknown words ['comets'])" in out.stderr


def test_sample_command_draws_sentences_the_grammar_can_parse():
    out = run_cli("sample", str(GRAMMAR), "-n", "20", "--seed", "4", "--max-words", "12")
    assert out.returncode == 0, out.stderr
    grammar = load_grammar(GRAMMAR)
    for line in out.stdout.splitlines():
        words, _ = line.split("\t")
        assert len(words.split()) <= 12
        assert score(grammar, [words.split()], dtype=torch.float64)[0].parsed


def test_a_bad_grammar_gives_one_line_with_file_and_line(tmp_path):
    bad = tmp_path / "bad.pcfg"
    bad.write_text("@start S\nS -> NP VP 1.0\nNP -> \"a\" 1.5\nVP -> \"b\" 1.0\n")
    out = run_cli("score", str(bad), "-", stdin="a b\n")
    assert out.returncode == 1
    assert out.stderr.strip() == f"treewright score: {bad}, line 3: probability 1.5 is outside [0, 1]"


def test_core_commands_read_a_json_export_as_well_as_the_text_format(tmp_path):
    # Reuse: the same scores from the grammar text file and from its JSON export (exact, as the
    # JSON keeps every probability's float64 value).
    from treewright.export import save_grammar_json

    save_grammar_json(load_grammar(GRAMMAR), tmp_path / "g.json")
    text = run_cli("score", str(GRAMMAR), "-", stdin=" ".join(SENTENCE) + "\n")
    json_ = run_cli("score", str(tmp_path / "g.json"), "-", stdin=" ".join(SENTENCE) + "\n")
    assert json_.returncode == 0, json_.stderr
    assert json_.stdout == text.stdout
