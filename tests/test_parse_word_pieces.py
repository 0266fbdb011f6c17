"""`parse --word-pieces`: CoNLL-U decoded under the word-piece constraint, as training applied it.

References: brute force over every tree of each sentence (tests/_brute.py), filtered by the
constraint's definition written out here (no span of two or more words starts at a barred
position with the host first, or ends just before one with the host last), and the barred
positions worked out by hand from each CoNLL-U block. The decoders under the constraint are
checked against enumeration in tests/test_decode.py; this file checks what reaches them from a
file and a run folder.
"""

from __future__ import annotations

import dataclasses
import json
import math

import pytest
import yaml

from _brute import all_trees
from _cli import cli
from _grammars import random_grammar
from treewright.grammar import load_grammar
from treewright.vocab import Vocabulary
from treewright.word_pieces import TAG_MODE_PIECE_EPOCHS, held_at_end

WORDS = ["w0", "w1", "w2", ","]
SEED_TAGS = 1   # a grammar on which the three readings of the tag file differ (asserted)

# Each block with the positions (0-based) that written joins bar, worked out by hand: a word
# whose line before says SpaceAfter=No, or the later words of a multiword token.
#  1. written words `w0w1` (words 1-2) and `w2w0` (words 3-4): positions 2 and 4.
#  2. a multiword token over words 1-2: position 2.
#  3. a comma written against `w2` (SpaceAfter=No, tagged PUNCT) is no piece of it: none.
#  4. a comma inside the written word `w0,w1` (pieces on both sides) stays a piece: 2 and 3.
#  5. no joins.
CONLLU = """\
# sent_id = one
1\tw2\t_\tX\t_\t_\t_\t_\t_\t_
2\tw0\t_\tX\t_\t_\t_\t_\t_\tSpaceAfter=No
3\tw1\t_\tX\t_\t_\t_\t_\t_\t_
4\tw2\t_\tX\t_\t_\t_\t_\t_\tSpaceAfter=No
5\tw0\t_\tX\t_\t_\t_\t_\t_\t_

1\tw1\t_\tX\t_\t_\t_\t_\t_\t_
2-3\tw2w1\t_\t_\t_\t_\t_\t_\t_\t_
2\tw2\t_\tX\t_\t_\t_\t_\t_\t_
3\tw1\t_\tX\t_\t_\t_\t_\t_\t_
4\tw0\t_\tX\t_\t_\t_\t_\t_\t_

1\tw0\t_\tX\t_\t_\t_\t_\t_\t_
2\tw1\t_\tX\t_\t_\t_\t_\t_\t_
3\tw2\t_\tX\t_\t_\t_\t_\t_\tSpaceAfter=No
4\t,\t_\tPUNCT\t_\t_\t_\t_\t_\t_
5\tw1\t_\tX\t_\t_\t_\t_\t_\t_

1\tw2\t_\tX\t_\t_\t_\t_\t_\t_
2\tw0\t_\tX\t_\t_\t_\t_\t_\tSpaceAfter=No
3\t,\t_\tPUNCT\t_\t_\t_\t_\t_\tSpaceAfter=No
4\tw1\t_\tX\t_\t_\t_\t_\t_\t_

1\tw1\t_\tX\t_\t_\t_\t_\t_\t_
2\tw0\t_\tX\t_\t_\t_\t_\t_\t_
3\tw2\t_\tX\t_\t_\t_\t_\t_\t_

"""
SENTENCES = [["w2", "w0", "w1", "w2", "w0"], ["w1", "w2", "w1", "w0"],
             ["w0", "w1", "w2", ",", "w1"], ["w2", "w0", ",", "w1"], ["w1", "w0", "w2"]]
BARRED = [[2, 4], [2], [], [2, 3], []]


def allowed(side: str, barred):
    def keep(spans) -> bool:
        return not any(j - i >= 2 and (i if side == "first" else j) in barred
                       for i, j, _ in spans)
    return keep


TREES: dict = {}    # every tree of a sentence under a grammar, by (grammar text, words)


def best_allowed(grammar, words, keep):
    """The most probable tree the constraint allows, as its labeled spans, its log-probability
    and the log of the summed probability of every allowed tree (brute force)."""
    key = (grammar.to_text(), tuple(words))
    if key not in TREES:
        TREES[key] = [(lp, spans) for lp, spans, _ in all_trees(grammar, words)]
    trees = [(lp, spans) for lp, spans in TREES[key] if keep(spans)]
    lp, spans = max(trees)
    names = grammar.symbols
    return sorted((i, j, names[a]) for i, j, a in spans), lp, \
        math.log(sum(math.exp(p) for p, _ in trees))


@pytest.fixture(scope="module")
def grammar_file(tmp_path_factory):
    g = random_grammar(3, 3, len(WORDS), seed=11)
    g = dataclasses.replace(g, vocab=Vocabulary(WORDS, unk=None))
    path = tmp_path_factory.mktemp("pieces") / "g.pcfg"
    g.save(path)
    conllu = path.parent / "text.conllu"
    conllu.write_text(CONLLU, encoding="utf-8")
    return path, conllu


def printed(out: str):
    from treewright.corpus import parse_brackets
    rows = [r.split("\t") for r in out.splitlines()]
    return [(sorted(parse_brackets(r[0])[0].labeled_spans()), r[1:]) for r in rows]


def labeled(spans):
    """Brute force's spans in the printed tree's form: every node, preterminals included."""
    return sorted((i, j, label) for i, j, label in spans)


@pytest.mark.parametrize("side", ["first", "last"])
def test_viterbi_under_the_constraint_of_each_conllu_block_matches_enumeration(grammar_file,
                                                                               side):
    path, conllu = grammar_file
    g = load_grammar(path)
    code, out, err = cli("parse", path, conllu, "--decoder", "viterbi", "--scores",
                         "--word-pieces", f"host-{side}")
    assert code == 0, err
    assert f"the host comes {side}; split written words in 3 of 5 sentences" in err
    changed = 0
    for words, barred, (spans, scores) in zip(SENTENCES, BARRED, printed(out), strict=True):
        want, lp, logz = best_allowed(g, words, allowed(side, barred))
        assert spans == labeled(want)
        assert float(scores[0]) == pytest.approx(lp, abs=1e-9)
        # The posterior among the allowed trees.
        assert float(scores[1]) == pytest.approx(math.exp(lp - logz), abs=1e-9)
        free, _, _ = best_allowed(g, words, lambda spans: True)
        changed += labeled(free) != spans
    assert changed >= 1     # the constraint acted on this grammar
    # --word-pieces none (and a bare grammar file with auto): the unconstrained best trees.
    for option in ("none", "auto"):
        code, out, err = cli("parse", path, conllu, "--decoder", "viterbi", "--word-pieces",
                             option)
        assert code == 0 and "word-piece" not in err
        for words, (spans, _) in zip(SENTENCES, printed(out), strict=True):
            assert spans == labeled(best_allowed(g, words, lambda spans: True)[0])


def test_mbr_under_the_constraint_keeps_every_piece_with_its_host(grammar_file):
    # The mbr decoder over the same file: no printed tree breaks the constraint (the decoder
    # itself is checked against enumeration in test_decode.py).
    path, conllu = grammar_file
    code, out, _ = cli("parse", path, conllu, "--decoder", "mbr", "--word-pieces", "host-first",
                       "--batch-size", "2")
    assert code == 0
    for barred, (spans, _) in zip(BARRED, printed(out), strict=True):
        assert allowed("first", barred)(spans)


def write_run(folder, grammar_path, config: dict, host):
    """A run folder as training leaves it, as far as `parse` reads it: the grammar, the
    config.yaml and data_summary.json."""
    folder.mkdir()
    (folder / "grammar.pcfg").write_bytes(grammar_path.read_bytes())
    (folder / "config.yaml").write_text(yaml.safe_dump(config))
    (folder / "data_summary.json").write_text(json.dumps({"word_pieces_host": host}))
    return folder


def test_auto_follows_what_the_run_held_at_its_last_epoch(grammar_file, tmp_path):
    path, conllu = grammar_file
    g = load_grammar(path)
    held = write_run(tmp_path / "held", path, {"data": {"tag_mode": False},
                                                "constraints": {"word_pieces_epochs": None},
                                                "train": {"epochs": 5}}, "last")
    code, out, err = cli("parse", held, conllu, "--decoder", "viterbi")
    assert code == 0
    assert "the host comes last" in err and "--word-pieces none decodes without it" in err
    for words, barred, (spans, _) in zip(SENTENCES, BARRED, printed(out), strict=True):
        assert spans == labeled(best_allowed(g, words, allowed("last", barred))[0])
    # Released before the last epoch: decoded without it, and nothing said.
    released = write_run(tmp_path / "released", path, {
        "data": {"tag_mode": False}, "constraints": {"word_pieces_epochs": 4},
        "train": {"epochs": 5}}, "last")
    code, out, err = cli("parse", released, conllu, "--decoder", "viterbi")
    assert code == 0 and "word-piece" not in err
    for words, (spans, _) in zip(SENTENCES, printed(out), strict=True):
        assert spans == labeled(best_allowed(g, words, lambda spans: True)[0])


def unlabeled_without(tree: str, gone: int) -> set:
    """The spans of two or more words of a printed tree with its word `gone` taken out, over
    the other words' positions."""
    from treewright.corpus import parse_brackets

    def shift(k):
        return k - (k > gone)
    spans = {(shift(i), shift(j)) for i, j, _ in parse_brackets(tree)[0].labeled_spans()}
    return {(i, j) for i, j in spans if j - i >= 2}


def test_tags_whose_words_training_removed_break_the_join_across_them(tmp_path):
    # A run on tags that removed PUNCT (data.drop_tags) and held the constraint to its end.
    # Written word `b,cd` (tags X0 PUNCT X1 X0): the comma inside it is left out of the parse,
    # which breaks the join of `c` to `b` across it, as training's reader does
    # (corpus.joined_without), while `d` stays joined to `c`. Over the kept tags
    # X2 X0 X1 X0 X2, position 3 is barred and position 2 is not.
    g = random_grammar(3, 3, 3, seed=SEED_TAGS)
    g = dataclasses.replace(g, vocab=Vocabulary(["X0", "X1", "X2"], unk=None))
    path = tmp_path / "tags.pcfg"
    g.save(path)
    g = load_grammar(path)
    tags = ["X2", "X0", "X1", "X0", "X2"]
    want = {(i, j) for i, j, _ in best_allowed(g, tags, allowed("first", [3]))[0] if j - i >= 2}
    # Had the join been kept across the comma, or the constraint not applied, the tree would
    # differ, so this file tells the three apart.
    for other in ([2, 3], []):
        assert want != {(i, j) for i, j, _ in best_allowed(g, tags, allowed("first", other))[0]
                        if j - i >= 2}
    run = write_run(tmp_path / "tags", path, {
        "data": {"tag_mode": True, "drop_tags": "PUNCT"},
        "constraints": {"word_pieces_epochs": TAG_MODE_PIECE_EPOCHS},
        "train": {"epochs": TAG_MODE_PIECE_EPOCHS}}, "first")
    text = tmp_path / "tags.conllu"
    text.write_text("1\ta\t_\tX2\t_\t_\t_\t_\t_\t_\n"
                    "2\tb\t_\tX0\t_\t_\t_\t_\t_\tSpaceAfter=No\n"
                    "3\t,\t_\tPUNCT\t_\t_\t_\t_\t_\tSpaceAfter=No\n"
                    "4\tc\t_\tX1\t_\t_\t_\t_\t_\tSpaceAfter=No\n"
                    "5\td\t_\tX0\t_\t_\t_\t_\t_\t_\n"
                    "6\te\t_\tX2\t_\t_\t_\t_\t_\t_\n\n"
                    # The same written word as one multiword token `b"c` (and `d` written
                    # against it): the removed quote inside the token does not part b from c,
                    # so positions 2 and 3 are barred.
                    "1\ta\t_\tX2\t_\t_\t_\t_\t_\t_\n"
                    "2-4\tb\"c\t_\t_\t_\t_\t_\t_\t_\tSpaceAfter=No\n"
                    "2\tb\t_\tX0\t_\t_\t_\t_\t_\t_\n"
                    "3\t\"\t_\tPUNCT\t_\t_\t_\t_\t_\t_\n"
                    "4\tc\t_\tX1\t_\t_\t_\t_\t_\t_\n"
                    "5\td\t_\tX0\t_\t_\t_\t_\t_\t_\n"
                    "6\te\t_\tX2\t_\t_\t_\t_\t_\t_\n\n", encoding="utf-8")
    code, out, err = cli("parse", run, text, "--decoder", "viterbi")
    assert code == 0, err
    assert "split written words in 2 of 2 sentences" in err
    assert unlabeled_without(out.splitlines()[0], 2) == want
    in_token = {(i, j) for i, j, _ in best_allowed(g, tags, allowed("first", [2, 3]))[0]
                if j - i >= 2}
    assert unlabeled_without(out.splitlines()[1], 2) == in_token


@pytest.mark.parametrize("summary, config, expect", [
    # Words: held for the whole run unless limited.
    ({"word_pieces_host": "first"}, {"data": {}, "constraints": {}, "train": {"epochs": 60}},
     "first"),
    ({"word_pieces_host": "last"}, {"constraints": {"word_pieces_epochs": 60},
                                    "train": {"epochs": 60}}, "last"),
    ({"word_pieces_host": "last"}, {"constraints": {"word_pieces_epochs": 59},
                                    "train": {"epochs": 60}}, None),
    # Tags: the first TAG_MODE_PIECE_EPOCHS epochs by default.
    ({"word_pieces_host": "first"}, {"data": {"tag_mode": True}, "train": {"epochs": 60}}, None),
    ({"word_pieces_host": "first"}, {"data": {"tag_mode": True},
                                     "train": {"epochs": TAG_MODE_PIECE_EPOCHS}}, "first"),
    ({"word_pieces_host": "first"}, {"data": {"tag_mode": True},
                                     "constraints": {"word_pieces_epochs": 100},
                                     "train": {"epochs": 60}}, "first"),
    # No side found, or no record of one (a run folder written before the field).
    ({"word_pieces_host": None}, {"train": {"epochs": 60}}, None),
    ({}, {"train": {"epochs": 60}}, None),
    (None, {"train": {"epochs": 60}}, None),
])
def test_held_at_end_reads_the_run_record(summary, config, expect):
    # Hand-worked from the rule of train/curriculum.py (epoch e applies the constraint when
    # e < word_pieces_epochs; epochs count from 0).
    assert held_at_end({"config": config, "data_summary": summary}) == expect
    assert held_at_end(None) is None


def test_held_at_end_agrees_with_the_training_schedule():
    # The training side of the same rule (Curriculum.pieces_on at the last epoch).
    from treewright.train.config import load_train_config
    from treewright.train.curriculum import Curriculum
    for tag_mode, limit, epochs in [(False, None, 7), (True, None, 7), (True, None, 3),
                                    (False, 6, 7), (False, 7, 7), (True, 9, 7)]:
        over = [f"data.tag_mode={str(tag_mode).lower()}", f"train.epochs={epochs}"]
        if limit is not None:
            over.append(f"constraints.word_pieces_epochs={limit}")
        cfg = load_train_config(None, over + ["data.train=unused.txt"])
        record = {"config": {"data": {"tag_mode": tag_mode},
                             "constraints": {"word_pieces_epochs": limit},
                             "train": {"epochs": epochs}},
                  "data_summary": {"word_pieces_host": "first"}}
        on = Curriculum(cfg, None, None).pieces_on(epochs - 1)
        assert (held_at_end(record) == "first") == on


def test_a_sentence_the_constraint_leaves_no_tree_is_decoded_without_it(tmp_path):
    # A grammar without every rule: `a a a` has one tree, (S (X a a) a), and with the host last
    # a join of the third word to the second bars its span [0, 2). That sentence is decoded
    # without the constraint and named; the other keeps it (its only tree is allowed).
    grammar = tmp_path / "g.pcfg"
    grammar.write_text("@start S\nS -> X P 1.0\nX -> P P 1.0\nP -> \"a\" 1.0\n",
                       encoding="utf-8")
    text = tmp_path / "text.conllu"
    text.write_text("1\ta\t_\tX\t_\t_\t_\t_\t_\t_\n"
                    "2\ta\t_\tX\t_\t_\t_\t_\t_\tSpaceAfter=No\n"
                    "3\ta\t_\tX\t_\t_\t_\t_\t_\t_\n\n"
                    "1\ta\t_\tX\t_\t_\t_\t_\t_\tSpaceAfter=No\n"
                    "2\ta\t_\tX\t_\t_\t_\t_\t_\t_\n"
                    "3\ta\t_\tX\t_\t_\t_\t_\t_\t_\n\n", encoding="utf-8")
    for decoder in ("viterbi", "mbr"):
        code, out, err = cli("parse", grammar, text, "--decoder", decoder, "--word-pieces",
                             "host-last")
        assert code == 0, err
        assert out.splitlines() == ["(S (X (P a) (P a)) (P a))"] * 2
        assert f"{text}, line 1: no tree keeps every piece" in err
        assert "line 5" not in err and "no parse" not in err


def test_report_decodes_the_gold_as_parse_does(grammar_file, tmp_path):
    # The report of a run that held the constraint to its end parses its gold CoNLL-U under
    # it, as `parse` does: the same trees as brute force over the allowed trees (viterbi), a
    # note on the page, and none for a run that released it.
    from treewright.corpus import read_corpus
    from treewright.report import html
    path, conllu = grammar_file
    g = load_grammar(path)
    heads = "\n".join(
        "\t".join(f[:6] + [str(int(f[0]) - 1), "dep" if f[0] != "1" else "root"] + f[8:])
        if len(f := line.split("\t")) == 10 and "-" not in f[0] else line
        for line in CONLLU.split("\n"))
    gold = tmp_path / "gold.conllu"
    gold.write_text(heads, encoding="utf-8")
    sentences = read_corpus(gold, "conllu").sentences
    assert [s.words for s in sentences] == SENTENCES
    parsed = html.parse_sentences(g, sentences, "viterbi", None, "first")
    assert parsed.pieced and not parsed.freed
    for words, barred, tree in zip(SENTENCES, BARRED, parsed.trees, strict=True):
        assert sorted(tree.labeled_spans()) == labeled(best_allowed(g, words,
                                                                    allowed("first", barred))[0])
    held = write_run(tmp_path / "held", path, {"data": {}, "constraints": {},
                                                "train": {"epochs": 5}}, "first")
    page = html.build_report(held, gold, decoder="viterbi")
    assert "decoded under the word-piece constraint the run held to its end" in page
    released = write_run(tmp_path / "released", path, {"data": {}, "constraints": {
        "word_pieces_epochs": 2}, "train": {"epochs": 5}}, "first")
    page = html.build_report(released, gold, decoder="viterbi")
    assert "word-piece constraint" not in page


def test_raw_text_marks_no_split_words(grammar_file, tmp_path):
    # Raw text has no joins: asked for, the constraint has nothing to act on, and says so;
    # the trees are the unconstrained ones (brute force).
    path, _ = grammar_file
    g = load_grammar(path)
    text = tmp_path / "raw.txt"
    text.write_text("\n".join(" ".join(s) for s in SENTENCES) + "\n", encoding="utf-8")
    code, out, err = cli("parse", path, text, "--decoder", "viterbi", "--word-pieces",
                         "host-first")
    assert code == 0 and "has nothing to act on: raw text" in err
    for words, (spans, _) in zip(SENTENCES, printed(out), strict=True):
        assert spans == labeled(best_allowed(g, words, lambda spans: True)[0])
    # Nor do bracketed trees, and a CoNLL-U file may mark none.
    trees = tmp_path / "text.trees"
    trees.write_text(out, encoding="utf-8")
    plain = tmp_path / "plain.conllu"
    plain.write_text("\n".join(line for line in CONLLU.replace("SpaceAfter=No", "_")
                               .split("\n") if not line.startswith("2-3")), encoding="utf-8")
    for source in (trees, plain):
        for command in (["parse", path, source], ["export", path, "--to", "brackets",
                                                  "--corpus", source, "--out", tmp_path / "o"]):
            code, _, err = cli(*command, "--word-pieces", "host-first")
            assert code == 0 and f"{source} marks no split written words" in err, err


def test_export_writes_the_trees_parse_decodes_under_the_constraint(grammar_file, tmp_path):
    # `export --to brackets --corpus` of a run that held the constraint: the Viterbi trees
    # among the allowed ones (brute force), as `parse --decoder viterbi` prints them; with
    # --word-pieces none, the unconstrained ones.
    path, conllu = grammar_file
    g = load_grammar(path)
    held = write_run(tmp_path / "held", path, {"data": {}, "constraints": {},
                                                "train": {"epochs": 5}}, "first")
    for option, side in (("auto", "first"), ("none", None)):
        out = tmp_path / f"{option}.trees"
        code, _, err = cli("export", held, "--to", "brackets", "--corpus", conllu, "--out", out,
                           "--word-pieces", option)
        assert code == 0, err
        assert ("decoding under the word-piece constraint" in err) == (side is not None)
        for words, barred, (spans, _) in zip(SENTENCES, BARRED, printed(out.read_text()),
                                             strict=True):
            keep = allowed(side, barred) if side else (lambda spans: True)
            assert spans == labeled(best_allowed(g, words, keep)[0])
