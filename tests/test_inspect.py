"""The inspect command: the listing in the terminal and one symbol in full with examples."""

from __future__ import annotations

import io
from contextlib import redirect_stderr, redirect_stdout
from pathlib import Path

import pytest

from treewright.cli import main
from treewright.export import symbol_examples
from treewright.grammar import load_grammar

ASTRONOMERS = (Path(__file__).resolve().parents[1] / "src" / "treewright" / "data"
              / "examples" / "astronomers.pcfg")
SENTENCES = ["astronomers saw stars with ears", "astronomers saw ears"]


def run_cli(*argv) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    with redirect_stdout(out), redirect_stderr(err):
        code = main([str(a) for a in argv])
    return code, out.getvalue(), err.getvalue()


@pytest.fixture
def corpus(tmp_path) -> Path:
    path = tmp_path / "text.txt"
    path.write_text("\n".join(SENTENCES) + "\n", encoding="utf-8")
    return path


def test_listing_in_the_terminal(corpus):
    code, out, _ = run_cli("inspect", ASTRONOMERS, "--corpus", corpus, "--top", "2")
    assert code == 0
    blocks = {b.split()[0]: b for b in out.split("\n\n")[1:]}
    assert set(blocks) == {"S", "PP", "VP", "NP", "P", "V"}
    # VP -> V NP 0.7 | VP PP 0.3: binary entropy h(0.3) = 0.8813 bits (from memory).
    assert "entropy 0.8813 bits" in blocks["VP"]
    # Usage, by hand: the first sentence's trees have posteriors 4/7 (NP attachment, 1 VP) and
    # 3/7 (VP attachment, 2 VPs); the second has one tree with one VP: 1 + 10/7 = 17/7.
    assert f"usage {17 / 7:.4f}" in blocks["VP"]
    # NP has 6 rules; the cap of 2 shows NP -> NP PP (0.4) and the first 0.18 word, and
    # counts the other 4 with their total probability 1 - 0.4 - 0.18 = 0.42.
    np_lines = blocks["NP"].splitlines()
    assert np_lines[1].split() == ["0.400000", "NP", "->", "NP", "PP"]
    assert np_lines[2].split() == ["0.180000", "NP", "->", '"ears"']
    assert np_lines[3].strip() == "... 4 more rules, total probability 0.420000"
    # Most used first: NP (usage 25/7 + 2 = 39/7) heads the list.
    assert out.split("\n\n")[1].startswith("NP ")


def test_one_symbol_with_example_spans(corpus):
    code, out, _ = run_cli("inspect", ASTRONOMERS, "--corpus", corpus, "--symbol", "PP")
    assert code == 0
    assert "PP -> P NP" in out
    example = [line for line in out.splitlines() if "[3:5]" in line]
    # PP covers "with ears" in both trees of sentence 1 (posterior 1, by hand: both trees).
    assert len(example) == 1 and example[0].split()[0] == "1.0000"
    assert example[0].rstrip().endswith("with ears")


def test_symbol_examples_rank_by_posterior():
    grammar = load_grammar(ASTRONOMERS)
    examples = symbol_examples(grammar, [s.split() for s in SENTENCES], "NP", limit=20)
    spans = {(e.sentence, e.start, e.end): e for e in examples}
    # The NP "stars with ears" exists only in the NP-attachment tree (the Viterbi tree), and
    # the posterior of that span is that tree's share: 0.0009072 / 0.0015876 = 4/7 (by hand).
    assert spans[(0, 2, 5)].posterior == pytest.approx(4 / 7)
    assert spans[(0, 2, 5)].in_viterbi
    posteriors = [e.posterior for e in examples]
    assert posteriors == sorted(posteriors, reverse=True)


def test_unknown_symbol_is_an_error(corpus):
    code, _, err = run_cli("inspect", ASTRONOMERS, "--symbol", "QQ")
    assert code == 1 and "no symbol QQ" in err and str(ASTRONOMERS) in err
