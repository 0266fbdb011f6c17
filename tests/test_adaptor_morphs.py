"""Orthographic words of a CoNLL-U corpus with gold morph boundaries at the joins of their
syntactic tokens, the two baselines, and the counts on the Turkish web treebank (PyPI
turkish-treebanks)."""

from __future__ import annotations

import sysconfig
from pathlib import Path

import pytest

from treewright.adaptor.morphs import baseline_scores, orthographic_words, read_written_words

TREEBANK = Path(sysconfig.get_paths()["purelib"]) / "data"

# Invented text in the CoNLL-U format (an open standard), heads omitted. Worked out by hand:
#   sentence 1: "Orrin" | "velo" = ve+lo (multiword token 2-3) | "Marratund" = Marra+tund
#               (SpaceAfter=No on 4) | "kal" then "," with SpaceAfter=No before "bri": the comma
#               is punctuation and is taken out, so "kal" and "bri" are words of their own.
#   sentence 2: "Eskomanu" = Esko+ma+nu (SpaceAfter=No on 1 and 2) | "sel".
# Orthographic words: orrin, ve|lo, marra|tund, kal, bri, esko|ma|nu, sel (7 words, 3 split,
# 4 gold boundaries: after "ve", after "marra", after "esko" and after "eskoma").
TOKENIZED = """\
# sent_id = quay-1
1\tOrrin\t_\tPROPN\t_\t_\t_\t_\t_\t_
2-3\tvelo\t_\t_\t_\t_\t_\t_\t_\t_
2\tve\t_\tADP\t_\t_\t_\t_\t_\t_
3\tlo\t_\tDET\t_\t_\t_\t_\t_\t_
4\tMarra\t_\tNOUN\t_\t_\t_\t_\t_\tSpaceAfter=No
5\ttund\t_\tNOUN\t_\t_\t_\t_\t_\t_
6\tkal\t_\tVERB\t_\t_\t_\t_\t_\tSpaceAfter=No
7\t,\t_\tPUNCT\t_\t_\t_\t_\t_\tSpaceAfter=No
8\tbri\t_\tVERB\t_\t_\t_\t_\t_\t_

# sent_id = quay-2
1\tEsko\t_\tVERB\t_\t_\t_\t_\t_\tSpaceAfter=No
2\tma\t_\tVERB\t_\t_\t_\t_\t_\tSpaceAfter=No
3\tnu\t_\tVERB\t_\t_\t_\t_\t_\t_
4\tsel\t_\tNOUN\t_\t_\t_\t_\t_\t_

"""


def test_written_words_and_their_morphs_from_a_small_conllu(tmp_path):
    path = tmp_path / "quay.conllu"
    path.write_text(TOKENIZED, encoding="utf-8")
    words = read_written_words(path)
    # Expected by hand (the comment above).
    assert words.morphs == [["orrin"], ["ve", "lo"], ["marra", "tund"], ["kal"], ["bri"],
                            ["esko", "ma", "nu"], ["sel"]]
    assert words.split == [["ve", "lo"], ["marra", "tund"], ["esko", "ma", "nu"]]
    assert words.sentences == 2 and words.skipped == 0
    assert words.types() == ["orrin", "velo", "marratund", "kal", "bri", "eskomanu", "sel"]


def test_a_sentence_without_joins_has_one_word_per_token():
    assert orthographic_words([(["A", "b"], None), (["c", "D"], [False, True])]) == \
        [["a"], ["b"], ["c", "d"]]


def test_baselines_on_the_small_conllu(tmp_path):
    path = tmp_path / "quay.conllu"
    path.write_text(TOKENIZED, encoding="utf-8")
    split = read_written_words(path).split
    scores = baseline_scores(split)
    # By hand: 4 gold boundaries. No split predicts none: P = R = F1 = 0 (the convention of
    # evaluation.segmentation). Every character: velo 3 positions, marratund 8, eskomanu 7,
    # so 18 predicted, all 4 gold among them: P = 4/18, R = 1, F1 = 2PR/(P+R) = 8/22.
    none, every = scores["no split"].boundaries, scores["every character"].boundaries
    assert (none.correct, none.predicted, none.gold, none.f1) == (0, 0, 4, 0.0)
    assert (every.correct, every.predicted, every.gold) == (4, 18, 4)
    assert every.precision == pytest.approx(4 / 18) and every.recall == 1.0
    assert every.f1 == pytest.approx(8 / 22)


@pytest.fixture(scope="module")
def web():
    return read_written_words(TREEBANK / "web.conllu")


def test_split_words_of_the_turkish_web_treebank_match_a_plain_count(web):
    # Independent count straight from the file's lines: within a sentence, a run of word lines
    # (PUNCT lines left out, which also end a run) joined by SpaceAfter=No on the line before
    # is one written word; runs of two or more are split words. The treebank has no multiword-
    # token ranges (checked here too), so SpaceAfter=No carries every join.
    split = boundaries = 0
    run, glue = 0, False
    for line in (TREEBANK / "web.conllu").read_text(encoding="utf-8").splitlines() + [""]:
        cols = line.split("\t")
        if line.startswith("#"):
            continue
        if len(cols) < 10 or cols[3] == "PUNCT":
            split += run >= 2
            boundaries += max(run - 1, 0)
            run, glue = 0, False
            continue
        assert "-" not in cols[0] and "." not in cols[0]
        if glue:
            run += 1
        else:
            split += run >= 2
            boundaries += max(run - 1, 0)
            run = 1
        glue = "SpaceAfter=No" in cols[9]
    assert len(web.split) == split
    assert sum(len(m) - 1 for m in web.split) == boundaries
    assert split > 4000 and web.skipped == 0


def test_turkish_baselines_every_character_has_full_recall(web):
    scores = baseline_scores(web.split)
    every = scores["every character"].boundaries
    # Every inner position of a split word is predicted (its length minus one, summed), and
    # every gold boundary is one of them.
    assert every.predicted == sum(len("".join(m)) - 1 for m in web.split)
    assert every.recall == 1.0 and every.correct == every.gold
    assert scores["no split"].boundaries.f1 == 0.0
