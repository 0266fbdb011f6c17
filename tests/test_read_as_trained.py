"""Every command that applies a run's grammar to text reads the text as the run read its
training corpus: lowercased words when data.lowercase, tags never lowercased in tag mode, and
the words of data.drop_tags left out of the parse (and put back into the printed tree).

References: the textbook grammar of Manning & Schuetze (1999, ch. 11; probabilities from
memory), whose sentence "astronomers saw stars with ears" has probability 0.0015876 (two
parses, 0.0009072 + 0.0006804); hand-written tag grammars worked by hand below; and
`evaluation.evaluate_brackets`' documented punctuation removal (common practice).
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import pytest

from _cli import cli
from treewright.corpus import insert_words, parse_brackets
from treewright.evaluation import Bracketing

TEXTBOOK = (Path(__file__).resolve().parents[1] / "src" / "treewright" / "data" / "examples"
            / "astronomers.pcfg")


def run_folder(path: Path, grammar_text: str, data: str) -> Path:
    """A run folder as training leaves it, for what the commands read: grammar and config."""
    path.mkdir()
    (path / "grammar.pcfg").write_text(grammar_text, encoding="utf-8")
    (path / "config.yaml").write_text("data:\n" + data, encoding="utf-8")
    return path


def test_evaluate_reads_the_text_lowercased_as_the_run_was_trained(tmp_path):
    run = run_folder(tmp_path / "run", TEXTBOOK.read_text(encoding="utf-8"),
                     "  lowercase: true\n")
    text = tmp_path / "s.txt"
    text.write_text("Astronomers saw STARS with ears\n", encoding="utf-8")
    tree = "(S (NP Astronomers) (VP (V saw) (NP (NP STARS) (PP (P with) (NP ears)))))\n"
    trees = tmp_path / "t.trees"
    trees.write_text(tree, encoding="utf-8")
    out = tmp_path / "e.json"
    assert cli("evaluate", trees, trees, "--grammar", run, "--text", text, "--json", out)[0] == 0
    likelihood = json.loads(out.read_text())["likelihood"]
    # Reference: the published sentence probability (two parses).
    assert math.exp(likelihood["total_logprob"]) == pytest.approx(0.0015876, rel=1e-6)
    assert likelihood["zero_probability_sentences"] == 0
    # The bare grammar file records no lowercasing: the capitals stay and do not parse.
    assert cli("evaluate", trees, trees, "--grammar", TEXTBOOK, "--text", text,
               "--json", out)[0] == 0
    assert json.loads(out.read_text())["likelihood"]["zero_probability_sentences"] == 1


# A grammar over upper-case tags, hand-written: S -> NOUN VP, VP -> VERB NOUN.
TAGS = """@start S
S -> N VP 1.0
VP -> V N 1.0
N -> "NOUN" 1.0
V -> "VERB" 1.0
"""


def test_tags_from_raw_text_are_not_lowercased_in_a_lowercasing_tag_run(tmp_path):
    run = run_folder(tmp_path / "run", TAGS, "  tag_mode: true\n  lowercase: true\n")
    text = tmp_path / "tags.txt"
    text.write_text("NOUN VERB NOUN\n", encoding="utf-8")
    code, out, err = cli("parse", run, text)
    # Hand-worked: the only tree of NOUN VERB NOUN.
    assert code == 0 and out == "(S (N NOUN) (VP (V VERB) (N NOUN)))\n"
    assert "lowercasing" not in err
    code, out, _ = cli("score", run, text, "--float64")
    assert json.loads(out.splitlines()[0])["logprob"] == 0.0  # probability one


def test_drop_tags_are_left_out_of_the_parse_and_put_back(tmp_path):
    run = run_folder(tmp_path / "run", TAGS, "  tag_mode: true\n  drop_tags: PUNCT\n")
    gold = tmp_path / "gold.trees"
    # Bracketed gold with a punctuation word inside the VP and one at the end.
    gold.write_text("(S (NOUN Orvek) (VP (VERB selim) (PUNCT ,) (NOUN tasko)) (PUNCT .))\n"
                    "(S (PUNCT -) (NOUN Hessa) (VP (VERB merun) (NOUN dorva)))\n",
                    encoding="utf-8")
    code, out, err = cli("parse", run, gold)
    assert code == 0, err
    first, second = (parse_brackets(line)[0] for line in out.splitlines())
    # Hand-worked: the tags' tree, with "," between the VP's children and "." and "-" at the
    # edges of the whole tree; every word as written, in order.
    assert first.to_string() == \
        "(S (N Orvek) (VP (V selim) (PUNCT ,) (N tasko)) (PUNCT .))"
    assert second.to_string() == "(S (PUNCT -) (N Hessa) (VP (V merun) (N dorva)))"
    # End to end: evaluate takes the output against the gold file, with punctuation removed
    # from both sides (common practice), and the gold brackets come out exactly.
    pred = tmp_path / "pred.trees"
    pred.write_text(out, encoding="utf-8")
    scores = tmp_path / "scores.json"
    code, _, err = cli("evaluate", pred, gold, "--json", scores)
    assert code == 0, err
    assert json.loads(scores.read_text())["brackets"]["systems"]["model"]["corpus_f1"] == 1.0
    # Raw text read as tags: the dropped tag is left out the same way.
    text = tmp_path / "tags.txt"
    text.write_text("NOUN VERB PUNCT NOUN\nPUNCT\n", encoding="utf-8")
    code, out, err = cli("parse", run, text)
    assert out.splitlines() == ["(S (N NOUN) (VP (V VERB) (PUNCT PUNCT) (N NOUN)))",
                                "(NOPARSE PUNCT)"]
    assert "line 2: no parse (every tag is one that training removed" in err


def test_score_and_evaluate_leave_out_the_dropped_tags_alike(tmp_path):
    run = run_folder(tmp_path / "run", TAGS, "  tag_mode: true\n  drop_tags: PUNCT\n")
    gold = tmp_path / "gold.conllu"
    # Two sentences whose tags, without PUNCT, are the grammar's only string NOUN VERB NOUN.
    rows = [("Orvek", "NOUN", 2), ("selim", "VERB", 0), (",", "PUNCT", 2), ("tasko", "NOUN", 2),
            (".", "PUNCT", 2)]
    block = "".join(f"{i}\t{w}\t_\t{t}\t_\t_\t{h}\t_\t_\t_\n"
                    for i, (w, t, h) in enumerate(rows, start=1))
    gold.write_text(block + "\n" + block + "\n", encoding="utf-8")
    code, out, err = cli("score", run, gold, "--float64")
    assert code == 0, err
    lines = [json.loads(line) for line in out.splitlines()]
    # Hand-worked: NOUN VERB NOUN has probability one; the records start on lines 1 and 7.
    assert [(x["line"], x["tokens"], x["logprob"]) for x in lines[:2]] == \
        [(1, ["NOUN", "VERB", "NOUN"], 0.0), (7, ["NOUN", "VERB", "NOUN"], 0.0)]
    assert lines[2]["summary"]["log_likelihood"] == 0.0
    # evaluate --text reads the file the same way: the same held-out likelihood.
    trees = tmp_path / "pred.trees"
    trees.write_text("(S (N Orvek) (VP (V selim) (P ,) (N tasko)) (P .))\n" * 2,
                     encoding="utf-8")
    scores = tmp_path / "e.json"
    code, _, err = cli("evaluate", trees, gold, "--grammar", run, "--text", gold,
                       "--json", scores)
    assert code == 0, err
    likelihood = json.loads(scores.read_text())["likelihood"]
    assert (likelihood["total_logprob"], likelihood["total_words"]) == (0.0, 6)


def test_a_word_run_with_drop_tags_says_why_raw_text_fails(tmp_path):
    words = TAGS.replace('"NOUN"', '"tasko"').replace('"VERB"', '"selim"')
    run = run_folder(tmp_path / "run", words, "  drop_tags: PUNCT\n")
    text = tmp_path / "s.txt"
    text.write_text("tasko selim , tasko\n", encoding="utf-8")
    code, out, err = cli("parse", run, text)
    assert code == 0 and out == "(NOPARSE tasko selim , tasko)\n"
    assert "unknown words [',']" in err and "data.drop_tags" in err


def test_insert_words_keeps_every_bracket_of_the_kept_words():
    # Reference: Bracketing.remove_words, the evaluation's punctuation removal.
    tree = parse_brackets("(S (X (A a) (B b)) (Y (C c) (Y (D d) (E e))))")[0]
    words = ["!", "a", "b", "?", "c", "d", ";", "e", "."]
    kept = [w.isalpha() for w in words]
    full = insert_words(tree, words, kept, ["P"] * len(words))
    assert full.leaves() == words
    back = Bracketing.from_tree(full).remove_words([i for i, k in enumerate(kept) if not k])
    assert back.spans == Bracketing.from_tree(tree).spans
    one = insert_words(parse_brackets("(A a)")[0], ["a", "."], [True, False], ["A", "P"])
    assert one.to_string() == "(A (A a) (P .))"
