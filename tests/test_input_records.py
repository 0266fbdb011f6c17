"""The commands that parse or score sentences read a bracketed-tree or CoNLL-U file one sentence
per record (its words as evaluation reads gold), every command detects CoNLL-U by content as
training does, and evaluate's held-out text treats blank lines as score and parse do.

References: the textbook grammar of Manning & Schuetze (1999, ch. 11; probabilities from
memory), whose sentence "astronomers saw stars with ears" has two parses, 0.0009072 (the PP
under the object NP) + 0.0006804 (the PP under the VP) = 0.0015876; the CoNLL-U format's
definition of a word line (ten tab-separated columns; ID a word index, a range like 3-4 for a
multiword token or a decimal like 5.1 for an empty node; lines starting with '#' are
comments), common practice. The words and trees below are invented.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import pytest

from _cli import cli
from treewright.corpus import detect_format, parse_brackets, read_corpus, read_records
from treewright.errors import InputError

TEXTBOOK = (Path(__file__).resolve().parents[1] / "src" / "treewright" / "data" / "examples"
            / "astronomers.pcfg")
SENTENCE = ["astronomers", "saw", "stars", "with", "ears"]
# The two parses' probabilities as the textbook gives them (from memory), and their sum.
BEST, OTHER = 0.0009072, 0.0006804
TOTAL = BEST + OTHER

# Two trees, the second spread over three lines with a root wrapper, a function tag and an
# empty element (-NONE-), which evaluation removes from gold (common practice).
TREES = ("(S (NP astronomers) (VP (V saw) (NP stars)))\n"
         "( (S (NP-SBJ astronomers)\n"
         "     (VP (V saw) (NP (NP stars) (-NONE- *T*-1) (PP (P with) (NP ears)))))\n"
         "  )\n")


def conllu_line(ident: str, form: str, head: str = "_") -> str:
    return "\t".join([ident, form, "_", "X", "_", "_", head, "dep" if head != "_" else "_",
                      "_", "_"])


# One block: comments, a multiword token (4-5 over "with" and "ears") and an empty node (3.1),
# neither of which is a syntactic word; then a block with only tokenized words (HEAD `_`).
CONLLU = "\n".join([
    "# sent_id = brisk-1",
    "# text = astronomers saw stars withears",
    conllu_line("1", "astronomers", "2"),
    conllu_line("2", "saw", "0"),
    conllu_line("3", "stars", "2"),
    conllu_line("3.1", "ghostword"),
    conllu_line("4-5", "withears"),
    conllu_line("4", "with", "5"),
    conllu_line("5", "ears", "3"),
    "",
    conllu_line("1", "astronomers"),
    conllu_line("2", "saw"),
    conllu_line("3", "stars"),
    "",
]) + "\n"


def write(tmp_path: Path, name: str, text: str) -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def score_lines(out: str) -> tuple[list[dict], dict]:
    rows = [json.loads(line) for line in out.splitlines()]
    return rows[:-1], rows[-1]["summary"]


# "astronomers saw stars": S -> NP VP (1.0), NP -> astronomers (0.1), VP -> V NP (0.7),
# V -> saw (1.0), NP -> stars (0.18): 0.1 * 0.7 * 0.18 = 0.0126, worked by hand.
SHORT = 0.1 * 0.7 * 0.18


def test_score_reads_one_sentence_per_tree_and_per_conllu_block(tmp_path):
    trees = write(tmp_path, "s.trees", TREES)
    code, out, err = cli("score", TEXTBOOK, trees, "--float64")
    assert code == 0, err
    rows, summary = score_lines(out)
    # One row per tree, numbered by the tree's first line; the multi-line tree's words without
    # its brackets and its empty element.
    assert [(r["line"], r["tokens"]) for r in rows] == [(1, SENTENCE[:3]), (2, SENTENCE)]
    assert [r["unknown"] for r in rows] == [[], []]
    assert math.exp(rows[0]["logprob"]) == pytest.approx(SHORT, rel=1e-9)
    assert math.exp(rows[1]["logprob"]) == pytest.approx(TOTAL, rel=1e-9)  # the textbook's
    assert summary["sentences"] == 2 and summary["words"] == 8

    conllu = write(tmp_path, "s.conllu", CONLLU)
    code, out, err = cli("score", TEXTBOOK, conllu, "--float64")
    assert code == 0, err
    rows, summary = score_lines(out)
    # One row per block, numbered by its first line (the first comment); the syntactic words
    # only: no comment, no multiword-token form, no empty node.
    assert [(r["line"], r["tokens"]) for r in rows] == [(1, SENTENCE), (11, SENTENCE[:3])]
    assert math.exp(rows[0]["logprob"]) == pytest.approx(TOTAL, rel=1e-9)
    assert math.exp(rows[1]["logprob"]) == pytest.approx(SHORT, rel=1e-9)


def test_parse_keeps_one_output_line_per_tree(tmp_path):
    trees = write(tmp_path, "s.trees", TREES)
    code, out, err = cli("parse", TEXTBOOK, trees, "--decoder", "viterbi")
    assert code == 0, err
    # Two trees in, two lines out (the second tree spans three input lines); the Viterbi tree
    # of the textbook sentence is its more probable parse, the PP under the object NP.
    assert out.splitlines() == [
        "(S (NP astronomers) (VP (V saw) (NP stars)))",
        "(S (NP astronomers) (VP (V saw) (NP (NP stars) (PP (P with) (NP ears)))))"]


def test_compare_on_a_bracketed_file_scores_its_words(tmp_path):
    trees = write(tmp_path, "s.trees", TREES)
    code, out, err = cli("compare", TEXTBOOK, TEXTBOOK, "--on", trees, "--json")
    assert code == 0, err
    result = json.loads(out)
    assert result["sentences"] == 2 and result["both_parsed"] == 2
    # Hand-worked above: log(0.0126) + log(0.0015876); a grammar agrees with itself.
    expected = math.log(SHORT) + math.log(TOTAL)
    assert result["heldout_a"]["log_likelihood"] == pytest.approx(expected, rel=1e-5)
    assert result["bracket_f1"] == pytest.approx(1.0)


def test_a_record_that_gives_no_sentence_is_named_by_file_and_line(tmp_path):
    # The second tree holds only an empty element: nothing is left to parse, and dropping it
    # would shift every later output line.
    trees = write(tmp_path, "s.trees", "(S (NP stars))\n\n(S (-NONE- *))\n")
    for command in ("score", "parse"):
        code, out, err = cli(command, TEXTBOOK, trees)
        assert code == 1 and out == ""
        assert f"{trees}, line 3" in err and "empty" in err
    with pytest.raises(InputError) as caught:
        read_records(trees)
    assert caught.value.line == 3
    # A malformed CoNLL-U word line (eight columns) is named by its own line.
    bad = CONLLU.replace(conllu_line("3", "stars", "2"), "3\tstars\t_\tX\t_\t_\t2\tdep")
    conllu = write(tmp_path, "bad.conllu", bad)
    code, _, err = cli("score", TEXTBOOK, conllu)
    assert code == 1 and f"{conllu}, line 5" in err and "10" in err


def test_conllu_is_detected_by_content_whatever_the_name(tmp_path):
    # The CoNLL-U definition of a word line (common practice): ten tab-separated columns, the
    # first an id (7, a range 3-4, or an empty node's 5.1), HEAD a number or _, after optional
    # '#' comments; a sentence's first line has id 1, 1-N or 0.N.
    assert detect_format(write(tmp_path, "a.txt", CONLLU)) == "conllu"
    assert detect_format(write(tmp_path, "b.data", CONLLU.split("\n", 2)[2])) == "conllu"
    mwt_first = conllu_line("1-2", "withears") + "\n" + conllu_line("1", "with") + "\n"
    assert detect_format(write(tmp_path, "c.txt", mwt_first)) == "conllu"
    empty_first = conllu_line("0.1", "ghostword") + "\n" + conllu_line("1", "saw") + "\n"
    assert detect_format(write(tmp_path, "d.txt", empty_first)) == "conllu"
    # Raw text stays raw text: tabs without the ten-column shape, ten columns whose first is a
    # word, or a '#' line before ordinary words.
    assert detect_format(write(tmp_path, "e.txt", "saw\tstars\tears\n")) == "text"
    words = "\t".join(["kelvo"] * 10)
    assert detect_format(write(tmp_path, "f.txt", words + "\n")) == "text"
    assert detect_format(write(tmp_path, "g.txt", "# kelvo\nsaw stars\n")) == "text"
    assert detect_format(write(tmp_path, "h.txt", "1\tsaw\n")) == "text"
    # ... and ten tab-separated tokens starting with a number that cannot start a sentence
    # (a sentence's first id is 1, 1-N or 0.N), or whose seventh (HEAD) is a word.
    numbered = "\t".join(["3"] + ["kelvo"] * 9)
    assert detect_format(write(tmp_path, "i.txt", numbered + "\nsaw stars\n")) == "text"
    headless = "\t".join(["1"] + ["kelvo"] * 9)
    assert detect_format(write(tmp_path, "j.txt", "# k\n" + headless + "\n")) == "text"
    # Training reads it as CoNLL-U too: its syntactic words, not its lines.
    corpus = read_corpus(tmp_path / "a.txt")
    assert corpus.report.fmt == "conllu"
    assert [s.words for s in corpus.sentences] == [SENTENCE, SENTENCE[:3]]
    # And score agrees with the .conllu name.
    code, out, err = cli("score", TEXTBOOK, tmp_path / "a.txt", "--float64")
    assert code == 0, err
    rows, _ = score_lines(out)
    assert [r["tokens"] for r in rows] == [SENTENCE, SENTENCE[:3]]


def _likelihood(tmp_path: Path, text: Path) -> dict:
    # Predictions keep empty elements, so the pair scored is a tree without one.
    gold = write(tmp_path, "gold.trees", TREES.splitlines()[0] + "\n")
    out = tmp_path / "e.json"
    code, _, err = cli("evaluate", gold, gold, "--grammar", TEXTBOOK, "--text", text,
                       "--json", out)
    assert code == 0, err
    return json.loads(out.read_text(encoding="utf-8"))["likelihood"]


def test_evaluate_text_skips_blank_lines_and_reads_trees_and_conllu(tmp_path):
    raw = write(tmp_path, "held.txt", " ".join(SENTENCE) + "\n\n   \n" + " ".join(SENTENCE[:3])
                + "\n")
    expected = math.log(TOTAL) + math.log(SHORT)  # hand-worked above
    from_raw = _likelihood(tmp_path, raw)
    # Blank and whitespace-only lines hold no sentence, as in score and parse.
    assert from_raw["sentences"] == 2 and from_raw["total_words"] == 8
    assert from_raw["total_logprob"] == pytest.approx(expected, rel=1e-6)
    from_trees = _likelihood(tmp_path, write(tmp_path, "held.trees", TREES))
    # The trees' order is (short, long); the sum is the same.
    assert from_trees["sentences"] == 2 and from_trees["total_words"] == 8
    assert from_trees["total_logprob"] == pytest.approx(expected, rel=1e-6)
    from_conllu = _likelihood(tmp_path, write(tmp_path, "held.conllu", CONLLU))
    assert from_conllu["total_logprob"] == pytest.approx(expected, rel=1e-6)
    # A blank-only text is refused with its name, not scored as nothing.
    blank = write(tmp_path, "blank.txt", "\n \n")
    gold = tmp_path / "gold.trees"
    code, _, err = cli("evaluate", gold, gold, "--grammar", TEXTBOOK, "--text", blank)
    assert code == 1 and str(blank) in err and "no sentences" in err


def test_read_records_matches_the_gold_reading_of_evaluation(tmp_path):
    # Reference: the trees' own leaves once their empty elements are removed, by hand.
    trees = write(tmp_path, "s.trees", TREES)
    assert [(s.line, s.words) for s in read_records(trees)] == [(1, SENTENCE[:3]),
                                                                 (2, SENTENCE)]
    written = [t.leaves() for t in parse_brackets(TREES)]
    assert written[1] == SENTENCE[:3] + ["*T*-1"] + SENTENCE[3:]


# A grammar over tags, hand-written: S -> N VP, VP -> V N, each rule of probability one.
TAGS = """@start S
S -> N VP 1.0
VP -> V N 1.0
N -> "NOUN" 1.0
V -> "VERB" 1.0
"""


def test_a_grammar_trained_on_tags_scores_the_tags_of_a_bracketed_file(tmp_path):
    run = tmp_path / "run"
    run.mkdir()
    (run / "grammar.pcfg").write_text(TAGS, encoding="utf-8")
    (run / "config.yaml").write_text("data:\n  tag_mode: true\n", encoding="utf-8")
    trees = write(tmp_path, "t.trees", "(S (NOUN Orvek)\n   (VP (VERB selim) (NOUN tasko)))\n")
    code, out, err = cli("score", run, trees, "--float64")
    assert code == 0, err
    rows, _ = score_lines(out)
    # Hand-worked: NOUN VERB NOUN has one tree, of probability one.
    assert [(r["line"], r["tokens"], r["logprob"]) for r in rows] == \
        [(1, ["NOUN", "VERB", "NOUN"], 0.0)]


def test_report_text_reads_one_sentence_per_tree(tmp_path):
    from treewright.report.html import gather

    run = tmp_path / "run"
    run.mkdir()
    (run / "grammar.pcfg").write_text(TEXTBOOK.read_text(encoding="utf-8"), encoding="utf-8")
    found = gather(run, text=write(tmp_path, "s.trees", TREES))
    # The trees' words, empty element out (worked by hand above), one sentence per tree.
    assert [(s.line, s.words) for s in found.text] == [(1, SENTENCE[:3]), (2, SENTENCE)]
    found = gather(run, text=write(tmp_path, "s.txt", "saw stars\n\nstars saw\n"))
    assert [(s.line, s.words) for s in found.text] == [(1, ["saw", "stars"]),
                                                        (3, ["stars", "saw"])]


def test_a_word_with_a_space_stays_one_leaf_and_is_scored_against_its_conllu_gold(tmp_path):
    # The CoNLL-U format allows a space inside FORM (common practice: words such as numbers
    # written with a space). A bracketed tree writes it with `_` so that it stays one leaf, and
    # evaluation compares words in that form, so a tree over the CoNLL-U words scores against
    # that gold. Hand-worked: "vesh" heads "lurri", so the gold's one span below the whole
    # sentence is (2, 4), which the tree has too.
    from treewright.trees import tree_from_spans
    words = ["ko", "tul ma", "lurri", "vesh"]
    tree = tree_from_spans(words, [(0, 4, "S"), (2, 4, "B")] +
                           [(i, i + 1, "A") for i in range(4)])
    assert tree.to_string() == "(S (A ko) (A tul_ma) (B (A lurri) (A vesh)))"
    pred = write(tmp_path, "pred.trees", tree.to_string() + "\n")
    gold = write(tmp_path, "gold.conllu", "\n".join([
        conllu_line("1", "ko", "2"), conllu_line("2", "tul ma", "0"),
        conllu_line("3", "lurri", "4"), conllu_line("4", "vesh", "2"), ""]) + "\n")
    report = tmp_path / "scores.json"
    code, out, err = cli("evaluate", pred, gold, "--json", report)
    assert code == 0, err
    model = json.loads(report.read_text(encoding="utf-8"))["brackets"]["systems"]["model"]
    assert (model["matched"], model["predicted"], model["gold"]) == (1, 1, 1)
