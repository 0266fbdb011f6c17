"""Comparing two grammars: hand-computed likelihoods and bracket agreement, exact recovery of a
known symbol permutation, and the assignment solver against brute force."""

from __future__ import annotations

import io
import itertools
import json
import math
from contextlib import redirect_stdout
from pathlib import Path

import numpy as np
import pytest

from treewright.cli import main
from treewright.export import compare
from treewright.export.compare import match_symbols
from treewright.grammar import Grammar, load_grammar, parse_grammar
from treewright.inference import generate

ASTRONOMERS = (Path(__file__).resolve().parents[1] / "src" / "treewright" / "data"
              / "examples" / "astronomers.pcfg")

# The textbook grammar with NP -> NP PP made rarer (0.1) and the freed 0.3 given to telescopes.
ASTRONOMERS_VP_ATTACH = """\
@start S
S -> NP VP 1.0
PP -> P NP 1.0
VP -> V NP 0.7
VP -> VP PP 0.3
P -> "with" 1.0
V -> "saw" 1.0
NP -> NP PP 0.1
NP -> "astronomers" 0.1
NP -> "ears" 0.18
NP -> "saw" 0.04
NP -> "stars" 0.18
NP -> "telescopes" 0.4
"""

# An invented language of the hill villages of Orsk (induction layout, start symbol TOP).
ORSK = """\
@start TOP
TOP -> C 0.9
TOP -> D 0.1
C -> D E 0.8
C -> C F 0.2
D -> A B 0.6
D -> A G 0.4
E -> H D 0.7
E -> H B 0.3
F -> K D 1.0
A -> "tu" 0.7
A -> "sa" 0.3
B -> "merri" 0.5
B -> "kolt" 0.3
B -> "pa" 0.2
G -> "vinu" 1.0
H -> "es" 0.55
H -> "ori" 0.45
K -> "dal" 1.0
"""


def test_likelihood_and_bracket_agreement_by_hand():
    a = load_grammar(ASTRONOMERS)
    b = parse_grammar(ASTRONOMERS_VP_ATTACH)
    result = compare(a, b, [["astronomers", "saw", "stars", "with", "ears"]])
    # Hand computation: under A the NP-attachment tree (.1*.7*.4*.18*.18 = 0.0009072) beats the
    # VP-attachment tree (.1*.3*.7*.18*.18 = 0.0006804); under B the NP one is
    # .1*.7*.1*.18*.18 = 0.0002268, so VP attachment wins.
    assert result.heldout_a["log_likelihood"] == pytest.approx(math.log(0.0009072 + 0.0006804))
    assert result.heldout_b["log_likelihood"] == pytest.approx(math.log(0.0002268 + 0.0006804))
    # Brackets (whole sentence and single words left out): A {(1,5) VP, (2,5) NP, (3,5) PP},
    # B {(1,5) VP, (1,3) VP, (3,5) PP}: two of three shared, F1 = 2 * 2 / (3 + 3).
    assert (result.brackets_a, result.brackets_b, result.brackets_shared) == (3, 3, 2)
    assert result.bracket_f1 == pytest.approx(2 / 3)
    assert result.same_bracketing == 0


def permuted(grammar: Grammar, seed: int) -> tuple[Grammar, dict[str, str]]:
    """The same grammar with its symbols in another (seeded) order under new names, and the
    mapping old name -> new name: the known answer the matching must find."""
    rng = np.random.default_rng(seed)
    nt, s = len(grammar.nonterminals), grammar.num_symbols
    order_nt = list(rng.permutation(nt))
    order_t = list(rng.permutation(s - nt))
    order = order_nt + [nt + k for k in order_t]   # new index -> old index
    names = [f"X{k}" for k in range(s)]
    new = Grammar(names[:nt], names[nt:], grammar.vocab, grammar.root[order_nt],
                  grammar.binary[order_nt][:, order][:, :, order], grammar.lexical[order],
                  "START")
    mapping = {grammar.symbols[old]: names[k] for k, old in enumerate(order)}
    return new, mapping


@pytest.mark.parametrize("seed", [0, 1])
def test_matching_recovers_a_known_permutation_exactly(seed):
    grammar = parse_grammar(ORSK)
    other, mapping = permuted(grammar, seed)
    sentences = [t.leaves() for t in generate(grammar, 15, seed=4, max_words=9)]
    result = compare(grammar, other, sentences)
    # Reference: the permutation the test applied.
    assert {m.a: m.b for m in result.matching} == mapping
    assert result.unmatched_a == [] and result.unmatched_b == []
    assert result.matched_fraction == 1.0 and result.bracket_f1 == 1.0
    assert result.heldout_a["log_likelihood"] == pytest.approx(
        result.heldout_b["log_likelihood"], rel=1e-12)


@pytest.mark.parametrize("shape, seed", [((3, 3), 0), ((3, 4), 1), ((4, 3), 2), ((5, 5), 3)])
def test_assignment_is_optimal_against_brute_force(shape, seed):
    counts = np.random.default_rng(seed).integers(0, 9, size=shape)
    rows, cols = shape
    a, b = [f"a{k}" for k in range(rows)], [f"b{k}" for k in range(cols)]
    matches, _, _ = match_symbols(counts, a, b)
    best = 0  # brute force: every injective pairing of the smaller side into the larger
    if rows <= cols:
        for perm in itertools.permutations(range(cols), rows):
            best = max(best, sum(counts[r, perm[r]] for r in range(rows)))
    else:
        for perm in itertools.permutations(range(rows), cols):
            best = max(best, sum(counts[perm[c], c] for c in range(cols)))
    assert sum(m.overlap for m in matches) == best
    assert len({m.a for m in matches}) == len(matches) == len({m.b for m in matches})


def _compare_json(a, b, text) -> dict:
    """The JSON that `treewright compare A B --on TEXT --json` prints."""
    out = io.StringIO()
    with redirect_stdout(out):
        assert main(["compare", str(a), str(b), "--on", str(text), "--json"]) == 0
    return json.loads(out.getvalue())


def _run_folder(path: Path, grammar_text: str) -> Path:
    """A run folder whose config.yaml says its training corpus was lowercased."""
    path.mkdir()
    (path / "grammar.pcfg").write_text(grammar_text, encoding="utf-8")
    (path / "config.yaml").write_text("data:\n  lowercase: true\n", encoding="utf-8")
    return path


def test_compare_command_prints_json(tmp_path):
    text = tmp_path / "s.txt"
    text.write_text("astronomers saw stars with ears\nastronomers saw ears\n", encoding="utf-8")
    b = tmp_path / "b.pcfg"
    b.write_text(ASTRONOMERS_VP_ATTACH, encoding="utf-8")
    data = _compare_json(ASTRONOMERS, b, text)
    # Sentence 2 has one tree under both (no PP), so its one bracket (1,3) is shared:
    # 3 + 1 brackets each, 2 + 1 shared (hand count as above).
    assert (data["brackets_a"], data["brackets_shared"]) == (4, 3)
    assert data["bracket_f1"] == pytest.approx(2 * 3 / 8)
    assert data["same_bracketing"] == 1 and data["both_parsed"] == 2


def test_compare_reads_the_text_as_each_run_was_trained(tmp_path):
    # Hand computation as in test_likelihood_and_bracket_agreement_by_hand, on the same
    # sentence written with capitals. Run A's config.yaml says its corpus was lowercased, so A
    # reads the words lowercased and gets the published likelihood; B is a bare grammar file,
    # records no such setting, reads the capitals as written and parses nothing.
    text = tmp_path / "s.txt"
    text.write_text("Astronomers saw STARS with ears\n", encoding="utf-8")
    run_a = _run_folder(tmp_path / "run-a", ASTRONOMERS.read_text(encoding="utf-8"))
    b = tmp_path / "b.pcfg"
    b.write_text(ASTRONOMERS_VP_ATTACH, encoding="utf-8")
    data = _compare_json(run_a, b, text)
    assert data["heldout_a"]["log_likelihood"] == pytest.approx(math.log(0.0009072 + 0.0006804))
    assert data["heldout_a"]["unparsed"] == 0 and data["heldout_b"]["unparsed"] == 1
    assert data["both_parsed"] == 0
    # B as a run folder trained the same way: both read "astronomers saw stars with ears", and
    # the hand counts of the lowercase sentence come back (3 and 3 brackets, 2 shared).
    run_b = _run_folder(tmp_path / "run-b", ASTRONOMERS_VP_ATTACH)
    data = _compare_json(run_a, run_b, text)
    assert data["heldout_b"]["log_likelihood"] == pytest.approx(math.log(0.0002268 + 0.0006804))
    assert (data["brackets_a"], data["brackets_b"], data["brackets_shared"]) == (3, 3, 2)


def test_compare_refuses_sentences_of_other_lengths():
    a = load_grammar(ASTRONOMERS)
    with pytest.raises(ValueError, match="one for one"):
        compare(a, a, [["astronomers", "saw", "stars"]], [["astronomers", "saw"]])


def test_a_grammar_that_parses_nothing_says_so(tmp_path, capsys):
    # Reference: "zorvath" and "quen" are not in the textbook grammar's vocabulary (checked
    # below), and it has no unknown-word rule, so no tree yields them: nothing can parse.
    path = ASTRONOMERS
    grammar = load_grammar(path)
    words = ["zorvath", "quen"]
    assert not any(w in grammar.vocab for w in words)
    result = compare(grammar, grammar, [words])
    assert result.heldout_a["parsed"] == 0 and result.heldout_a["log_likelihood"] is None
    text = result.format("a", "b")
    assert "held-out a: no sentence parsed (1 of 1 without a parse)" in text
    assert "log-likelihood 0" not in text and "nan" not in text
    assert "no sentence parsed by both" in text
    (tmp_path / "t.txt").write_text("zorvath quen\n")
    assert main(["compare", str(path), str(path), "--on", str(tmp_path / "t.txt"),
                 "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["heldout_a"]["log_likelihood"] is None and data["heldout_a"]["parsed"] == 0
