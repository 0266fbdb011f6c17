"""CoNLL-U with predicted heads (`export.heads`) read back, and `treewright evaluate` on heads.

References: the `conllu` package (the CoNLL-U reader `corpus/dependencies.py` uses) reads every
written file back, and every column but HEAD and DEPREL must equal what it reads from the input;
the Turkish Web Treebank `web` section (PyPI turkish-treebanks) with the left chain written as
the prediction, scored by the command against the plain count of tests/test_dependency_eval.py;
the hand-worked sentences of tests/test_dependency_eval.py through files. Toy words are
Kethravi (the invented demo language).
"""

from __future__ import annotations

import argparse
import json
import sysconfig
from pathlib import Path

import conllu
import pytest

from test_dependency_eval import P1, P2, S1, S2, direct_chain_counts
from treewright.cli import evaluate as evaluate_cmd
from treewright.errors import InputError
from treewright.evaluation import Dependencies
from treewright.export import fill_heads_conllu, heads_to_conllu

WEB = Path(sysconfig.get_paths()["purelib"]) / "data" / "web.conllu"

# A sentence with every kind of line: comments, a multiword token (3-4), an empty node (4.1),
# LEMMA, UPOS, XPOS, FEATS, DEPS and MISC filled; gold HEAD and DEPREL to be replaced.
RICH = """\
# sent_id = harbour-1
# text = ko brosk velmo tullik.
1\tko\tko\tDET\tDt\tDefinite=Def\t2\tdet\t2:det\t_
2\tbrosk\tbrosk\tNOUN\tNn\tNumber=Sing\t5\tnsubj\t5:nsubj\t_
3-4\tvelmo\t_\t_\t_\t_\t_\t_\t_\t_
3\tvel\tvel\tADP\tPp\t_\t4\tcase\t4:case\t_
4\tmo\tmo\tPRON\tPr\tCase=Loc\t5\tobl\t5:obl\t_
4.1\tvor\tvor\tVERB\t_\t_\t_\t_\t5:conj\t_
5\ttullik\ttull\tVERB\tVi\tTense=Past\t0\troot\t0:root\tSpaceAfter=No
6\t.\t.\tPUNCT\tPc\t_\t5\tpunct\t5:punct\t_

# sent_id = harbour-2
1\tsa\tsa\tDET\t_\t_\t2\tdet\t_\t_
2\tOrvek\tOrvek\tPROPN\t_\t_\t0\troot\t_\t_

"""


def write(path: Path, text: str) -> Path:
    path.write_text(text, encoding="utf-8")
    return path


def run(argv) -> int:
    parser = argparse.ArgumentParser()
    evaluate_cmd.add_arguments(parser)
    return evaluate_cmd.run(parser.parse_args([str(a) for a in argv]))


def test_fill_keeps_every_other_column_and_line(tmp_path):
    source = write(tmp_path / "in.conllu", RICH)
    heads = [[0, 1, 2, 3, 4, 5], [0, 1]]
    out = fill_heads_conllu(source, heads)
    before, after = conllu.parse(RICH), conllu.parse(out)
    assert len(after) == 2
    for b, a, h in zip(before, after, heads):
        assert a.metadata == b.metadata                    # comments kept
        assert len(a) == len(b)                            # multiword and empty lines kept
        words = iter(h)
        for tb, ta in zip(b, a):
            for column in ("id", "form", "lemma", "upos", "xpos", "feats", "deps", "misc"):
                assert ta[column] == tb[column], column
            if isinstance(tb["id"], int):
                assert ta["head"] == next(words)           # the predicted head
                assert ta["deprel"] == "_"                 # unknown
            else:
                assert (ta["head"], ta["deprel"]) == (tb["head"], tb["deprel"])
    # Apart from HEAD and DEPREL the text is the input, line for line.
    strip = [line.split("\t")[:6] + line.split("\t")[8:] for line in RICH.splitlines()]
    assert [line.split("\t")[:6] + line.split("\t")[8:] for line in out.splitlines()] == strip


def test_unparsed_sentence_keeps_head_unknown_and_reads_back(tmp_path):
    source = write(tmp_path / "in.conllu", RICH)
    after = conllu.parse(fill_heads_conllu(source, [None, [2, 0]]))
    assert all(t["head"] is None for t in after[0])
    assert [t["head"] for t in after[1]] == [2, 0]


@pytest.mark.parametrize("heads, message, line", [
    ([[0, 1, 2, 3, 4, 5]], "1 sentences of heads for 2", 12),
    ([[0, 1, 2, 3, 4], [0, 1]], "5 heads for 6 words", 1),
    ([[0, 1, 2, 3, 4, 5], [2, 1]], "cycle", 12),
    ([[0, 1, 2, 3, 4, 9], [0, 1]], "outside", 1),
])
def test_fill_refuses_heads_that_do_not_fit(tmp_path, heads, message, line):
    source = write(tmp_path / "in.conllu", RICH)
    with pytest.raises(InputError) as err:
        fill_heads_conllu(source, heads)
    assert message in str(err.value)
    assert (err.value.path, err.value.line) == (str(source), line)


def test_words_to_conllu_reads_back():
    sentences = [["ko", "brosk", "tullik", "."], ["sa", "Orvek"]]
    heads = [[2, 3, 0, 3], None]
    text = heads_to_conllu(sentences, heads, sent_ids=["4", "7"])
    parsed = conllu.parse(text)
    assert [[t["form"] for t in s] for s in parsed] == sentences
    assert [t["head"] for t in parsed[0]] == [2, 3, 0, 3]
    assert [t["head"] for t in parsed[1]] == [None, None]
    assert [s.metadata for s in parsed] == [{"sent_id": "4", "text": "ko brosk tullik ."},
                                            {"sent_id": "7", "text": "sa Orvek"}]
    # Every column but ID, FORM and HEAD is `_` on every word line.
    rows = [line.split("\t") for line in text.splitlines() if line and not line.startswith("#")]
    assert len(rows) == 6 and all(len(r) == 10 for r in rows)
    assert all(r[2:6] + r[7:] == ["_"] * 7 for r in rows)


def conllu_text(sentences: list[Dependencies], heads=None) -> str:
    """Minimal CoNLL-U of the test sentences: FORM, UPOS and HEAD."""
    blocks = []
    for k, s in enumerate(sentences):
        h = s.heads if heads is None else heads[k]
        blocks.append("".join(f"{i}\t{w}\t_\t{t}\t_\t_\t{h[i - 1]}\t_\t_\t_\n"
                              for i, (w, t) in enumerate(zip(s.words, s.tags), start=1)))
    return "\n".join(blocks) + "\n"


def test_command_scores_hand_worked_heads(tmp_path, capsys):
    gold = write(tmp_path / "gold.conllu", conllu_text([S1, S2]))
    pred = write(tmp_path / "pred.conllu", conllu_text([S1, S2], [P1, P2]))
    out = tmp_path / "heads.json"
    assert run([pred, gold, "--json", out]) == 0
    table = capsys.readouterr().out
    assert "left chain" in table and "right chain" in table and "common practice" in table
    systems = json.loads(out.read_text())["attachment"]["systems"]
    # Hand-worked in tests/test_dependency_eval.py: model 3/7 and 5/7, left chain 0/7 and 3/7,
    # right chain 5/7 and 5/7.
    assert (systems["model"]["directed_correct"], systems["model"]["undirected_correct"]) == (3, 5)
    assert (systems["left_chain"]["directed_correct"],
            systems["left_chain"]["undirected_correct"]) == (0, 3)
    assert (systems["right_chain"]["directed_correct"],
            systems["right_chain"]["undirected_correct"]) == (5, 5)
    # Keeping punctuation: 4/10 (hand-worked there too).
    assert run([pred, gold, "--keep-punctuation", "--json", "-"]) == 0
    model = json.loads(capsys.readouterr().out)["attachment"]["systems"]["model"]
    assert (model["directed_correct"], model["words"]) == (4, 10)


def test_command_scores_heads_over_the_words_without_punctuation(tmp_path, capsys):
    # A model that never saw punctuation: its CoNLL-U (written by heads_to_conllu) holds the
    # words left, S1 "ko brosk tulm dorvik" and S2 "sa Orvek tullik", with P1 and P2 written
    # over them (hand-worked in tests/test_dependency_eval.py): the same 3/7 and 5/7.
    gold = write(tmp_path / "gold.conllu", conllu_text([S1, S2]))
    pred = write(tmp_path / "pred.conllu", heads_to_conllu(
        [["ko", "brosk", "tulm", "dorvik"], ["sa", "Orvek", "tullik"]], [[0, 1, 2, 2], [3, 3, 0]]))
    assert run([pred, gold, "--json", "-"]) == 0
    model = json.loads(capsys.readouterr().out)["attachment"]["systems"]["model"]
    assert (model["directed_correct"], model["undirected_correct"], model["words"]) == (3, 5, 7)


def test_command_names_the_mismatching_line(tmp_path):
    gold = write(tmp_path / "gold.conllu", conllu_text([S1, S2]))
    other = Dependencies(("sa", "Orvek", ";", "tullik"), S2.heads, S2.tags)
    pred = write(tmp_path / "pred.conllu", conllu_text([S1, other]))
    with pytest.raises(InputError) as err:
        run([pred, gold])
    # The second block starts on line 8 (six word lines, then a blank line).
    assert (err.value.path, err.value.line) == (str(pred), 8)
    assert "';'" in str(err.value)
    brackets = write(tmp_path / "gold.trees", "(S (x ko) (x brosk))\n")
    with pytest.raises(InputError, match="CoNLL-U gold"):
        run([pred, brackets])


@pytest.mark.skipif(not WEB.exists(), reason="turkish-treebanks not installed")
def test_left_chain_written_and_scored_on_turkish(tmp_path, capsys):
    # The first 300 blocks of the web section as the gold file, as written in the package.
    blocks = WEB.read_text(encoding="utf-8").split("\n\n")[:300]
    gold = write(tmp_path / "web300.conllu", "\n\n".join(blocks) + "\n\n")
    sentences = []
    for s in conllu.parse(gold.read_text(encoding="utf-8")):
        words = [t for t in s if isinstance(t["id"], int)]
        sentences.append(Dependencies(tuple(t["form"] for t in words),
                                      tuple(t["head"] for t in words),
                                      tuple(t["upos"] for t in words)))
    # The prediction: each non-PUNCT word headed by the non-PUNCT word before it, the first one
    # by 0; PUNCT words by 0 (not scored).
    heads = []
    for s in sentences:
        kept = [k for k, tag in enumerate(s.tags, start=1) if tag != "PUNCT"]
        h = [0] * len(s.words)
        for before, word in zip(kept, kept[1:]):
            h[word - 1] = before
        heads.append(h)
    pred = write(tmp_path / "pred.conllu", fill_heads_conllu(gold, heads))
    assert run([pred, gold, "--punctuation-tags", "PUNCT", "--json", "-"]) == 0
    model = json.loads(capsys.readouterr().out)["attachment"]["systems"]["model"]
    # The plain count of tests/test_dependency_eval.py over the same sentences.
    assert (model["directed_correct"], model["undirected_correct"], model["ned_correct"],
            model["words"]) == direct_chain_counts(sentences, "left")
    # Every column but HEAD and DEPREL came through (the conllu package reads both files).
    for b, a in zip(conllu.parse(gold.read_text(encoding="utf-8")),
                    conllu.parse(pred.read_text(encoding="utf-8"))):
        assert a.metadata == b.metadata
        assert [{k: v for k, v in t.items() if k not in ("head", "deprel")} for t in a] == \
            [{k: v for k, v in t.items() if k not in ("head", "deprel")} for t in b]
