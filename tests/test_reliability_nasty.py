"""Hand-made nasty inputs (tests/nasty/) and big generated ones (into tmp_path), read through the
public readers; and sentences a grammar cannot parse, reported one by one within a batch.

Expected values are worked out by hand from the bytes of each file (stated beside each check);
line numbers count \\n, \\r\\n and a lone \\r as one line break each, as an editor does.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import pytest
import torch

from test_train_fixtures import VELMOR
from treewright.cli import main
from treewright.corpus import ReadOptions, depth, read_corpus
from treewright.errors import InputError
from treewright.grammar import load_grammar, parse_grammar
from treewright.inference import score, viterbi_parse

NASTY = Path(__file__).parent / "nasty"


def _tokens(path: Path, fmt: str = "auto", **options) -> list[list[str]]:
    return [s.tokens for s in read_corpus(path, fmt, ReadOptions(**options)).sentences]


# ---- corpora -------------------------------------------------------------------------------

def test_control_characters_stay_inside_their_words():
    # By hand: \x00, \x07, \x1b, \x7f, \x01 and \x02 are not whitespace (str.split, the Python
    # documentation's definition), so they stay inside the words they touch; nothing is dropped.
    corpus = read_corpus(NASTY / "control_characters.txt", "text")
    assert [s.tokens for s in corpus.sentences] == [
        ["ta\x00ferro", "orun\x07", "kip"], ["mo", "\x1blanu", "sul\x7f"], ["\x01\x02"]]
    assert corpus.report.sentences_read == corpus.report.sentences_used == 3


def test_mixed_line_endings_are_all_line_breaks():
    # By hand: \r\n, \r, \n, \r\n end lines 1-4.
    corpus = read_corpus(NASTY / "mixed_line_endings.txt", "text")
    assert [(s.line, s.tokens) for s in corpus.sentences] == [
        (1, ["ta", "ferro", "sul"]), (2, ["mo", "lanu", "sul"]), (3, ["kip", "orun", "kip"]),
        (4, ["kip", "sul"])]


@pytest.mark.parametrize("name,fmt,first", [
    ("byte_order_mark.txt", "text", ["ta", "ferro", "sul"]),
    ("byte_order_mark.trees", "auto", ["kip", "sul"]),
    ("byte_order_mark.conllu", "auto", ["kip", "sul"]),
])
def test_a_byte_order_mark_is_not_part_of_the_first_word(name, fmt, first):
    # The BOM (U+FEFF) marks the encoding, it is not text (Unicode standard, from memory).
    assert _tokens(NASTY / name, fmt)[0] == first


@pytest.mark.parametrize("name,line,column", [
    # By hand: "mo la\xffnu sul" is line 3 and \xff the 6th character; the CoNLL-U file has
    # "1\tsu\xc3l..." on line 3, where \xc3 starts a two-byte sequence that "l" cannot end.
    ("invalid_utf8_middle.txt", 3, 6),
    ("invalid_utf8_middle.conllu", 3, 5),
])
def test_invalid_utf8_in_the_middle_names_line_and_column(name, line, column):
    with pytest.raises(InputError) as info:
        read_corpus(NASTY / name)
    err = info.value
    assert (err.path, err.line, err.column) == (str(NASTY / name), line, column)
    assert "not UTF-8" in str(err)


def test_an_unclosed_tree_is_named_and_the_others_are_kept_with_skip_bad():
    # By hand: the tree opened on line 2 closes only at the end of line 3, where the outermost
    # bracket of line 2 is still open at the end of the file.
    corpus = read_corpus(NASTY / "unbalanced.trees", "brackets", ReadOptions(skip_bad=True))
    assert [s.tokens for s in corpus.sentences] == [["kip", "sul"]]
    assert corpus.report.skipped_by_reason == {"malformed": 1}
    assert corpus.report.skipped[0].line == 2
    with pytest.raises(InputError, match="never closed") as info:
        read_corpus(NASTY / "unbalanced.trees", "brackets")
    assert info.value.line == 2


def test_a_ten_thousand_token_line(tmp_path):
    path = tmp_path / "long.txt"
    words = [f"w{k % 97}" for k in range(10_000)]
    path.write_text("kip sul\n" + " ".join(words) + "\nta ferro sul\n")
    corpus = read_corpus(path, "text")
    assert [len(s) for s in corpus.sentences] == [2, 10_000, 3]
    assert corpus.sentences[1].tokens == words
    # With a length limit the long line is set aside and counted, never silently dropped.
    limited = read_corpus(path, "text", ReadOptions(max_length=40))
    assert [len(s) for s in limited.sentences] == [2, 3]
    assert limited.report.skipped_by_reason == {"too_long": 1}
    assert [len(s) for s in limited.set_aside] == [10_000]


def test_a_million_empty_lines(tmp_path):
    path = tmp_path / "empty.txt"
    path.write_bytes(b"\n" * 500_000 + b"kip sul\n" + b"\r\n" * 500_000)
    corpus = read_corpus(path, "text")
    assert [(s.line, s.tokens) for s in corpus.sentences] == [(500_001, ["kip", "sul"])]
    # Every empty line is counted: 1,000,001 lines read, one used.
    assert corpus.report.sentences_read == 1_000_001
    assert corpus.report.skipped_by_reason == {"empty": 1_000_000}


def test_only_empty_lines_is_an_error_naming_the_file(tmp_path):
    path = tmp_path / "blank.txt"
    path.write_bytes(b"\n" * 1000)
    with pytest.raises(InputError, match="no usable sentence") as info:
        read_corpus(path, "text")
    assert info.value.path == str(path)


def test_a_tree_nested_five_thousand_deep(tmp_path):
    deep = 5000
    path = tmp_path / "deep.trees"
    # (X (X ... (X kip) ...) sul): the innermost X is a preterminal, each outer X adds a word.
    text = "(X " * deep + "kip" + ")" + " sul)" * (deep - 1) + "\n"
    path.write_text(text)
    corpus = read_corpus(path, "brackets")
    [sentence] = corpus.sentences
    assert sentence.tokens == ["kip"] + ["sul"] * (deep - 1)
    # Depth of a tree of `deep` nested phrases over a word: deep + 1 levels counting the word,
    # by the definition in treewright.corpus.walk.depth (checked on the 2-level case below).
    assert depth(sentence.tree) - depth(read_corpus(_one(tmp_path, "(X kip)"), "brackets")
                                        .sentences[0].tree) == deep - 1
    assert sentence.tree.to_string().count("(") == deep


def _one(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "one.trees"
    path.write_text(text + "\n")
    return path


# ---- grammars ------------------------------------------------------------------------------

@pytest.mark.parametrize("name,line,words", [
    ("undefined_symbol.pcfg", 3, "VP is used but has no rules"),
    ("no_path_to_words.pcfg", None, "ever reaches a word"),
    ("nan_probability.pcfg", 3, "outside [0, 1]"),
    ("negative_probability.pcfg", 3, "outside [0, 1]"),
])
def test_bad_grammars_are_refused_with_file_and_line(name, line, words):
    with pytest.raises(InputError) as info:
        load_grammar(NASTY / name)
    err = info.value
    assert err.path == str(NASTY / name) and err.line == line
    assert words in err.reason


# ---- sentences a grammar cannot parse, inside a batch ------------------------------------

def _pruned_velmor():
    # Velmor without VP -> "sul" (the rest of VP renormalised): "kip sul" then has no tree.
    text = VELMOR.replace('VP -> "sul" 0.4\n', "").replace("VP -> V NP 0.6", "VP -> V NP 1.0")
    return parse_grammar(text)


def test_unparsable_sentences_are_reported_and_the_rest_of_the_batch_is_scored():
    grammar = parse_grammar(VELMOR)
    sentences = [["kip", "sul"], ["kip", "zorb"], ["kip", "kip"], ["ta", "ferro", "sul"]]
    got = score(grammar, sentences, batch_size=4, dtype=torch.float64)
    # By hand from Velmor's rules (each sentence has one tree):
    # kip sul = 0.3 * 0.4; ta ferro sul = 0.7 * 0.5 * 0.4 * 0.4.
    assert got[0].logprob == pytest.approx(math.log(0.3 * 0.4), abs=1e-12)
    assert got[3].logprob == pytest.approx(math.log(0.7 * 0.5 * 0.4 * 0.4), abs=1e-12)
    # "zorb" is unknown and Velmor has no unknown-word rule; "kip kip" has no tree (VP never
    # rewrites to "kip"). Both are reported, with the unknown word named.
    assert [s.parsed for s in got] == [True, False, False, True]
    assert got[1].unknown == ["zorb"] and got[2].unknown == []
    trees = viterbi_parse(grammar, sentences)
    assert [t is None for t, _ in trees] == [False, True, True, False]


def test_zero_probability_under_a_pruned_grammar_is_reported_per_sentence():
    got = score(_pruned_velmor(), [["kip", "sul"], ["kip", "orun", "kip"]], dtype=torch.float64)
    # By hand: kip orun kip = NP(0.3) * VP -> V NP (1.0) * V(0.5) * NP(0.3).
    assert not got[0].parsed
    assert got[1].logprob == pytest.approx(math.log(0.3 * 1.0 * 0.5 * 0.3), abs=1e-12)


def test_score_command_reports_each_unparsable_sentence(tmp_path, capsys):
    grammar, text = tmp_path / "velmor.pcfg", tmp_path / "s.txt"
    grammar.write_text(VELMOR)
    text.write_text("kip sul\nkip zorb\nkip kip\nta ferro sul\n")
    assert main(["score", str(grammar), str(text), "--float64"]) == 0
    rows = [json.loads(line) for line in capsys.readouterr().out.splitlines()]
    assert [r.get("parsed") for r in rows[:4]] == [True, False, False, True]
    assert [r["line"] for r in rows[:4]] == [1, 2, 3, 4]
    assert rows[1]["unknown"] == ["zorb"]
    # By hand: two of the four sentences parse.
    assert rows[4]["summary"]["parsed"] == 2 and rows[4]["summary"]["unparsed"] == 2
