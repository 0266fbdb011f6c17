"""Trees of a grammar refined from a treebank are written in the treebank's form: `parse` and
`export --to brackets|conllu` undo the binarization and split the joined unary chains, as
refinement's own held-out labeled F1 reads them, so `parse` + `evaluate --labeled yes` gives
that F1.

The treebank is hand-written here in the invented language Velmor: a ternary S, the unary
chains NP -> N and VP -> VI over one word each."""

from __future__ import annotations

import json

import pytest

from _treebank import refine_on_trees
from treewright.cli import main
from treewright.corpus import parse_brackets as parse_all, treebank_form
from treewright.grammar import coarse_name
from treewright.refine.run import cnf_tree

def parse_brackets(text: str):
    (tree,) = parse_all(text)
    return tree


TRAIN = [
    "(S (NP (N kip)) (VP (V orun) (NP (D ta) (N ferro))) (P .))",
    "(S (NP (D mo) (N lanu)) (VP (VI sul)) (P .))",
    "(S (NP (D ta) (N vesk)) (VP (V dast) (NP (N kip))) (P .))",
]
HELD_OUT = [
    "(S (NP (N kip)) (VP (VI sul)) (P .))",
    "(S (NP (D mo) (N ferro)) (VP (V orun) (NP (N kip))) (P .))",
]


def test_treebank_form_undoes_the_cnf_transform_and_projects_subcategories():
    tree = parse_brackets(TRAIN[1])
    # Reference: the input tree itself (the transforms have exact inverses).
    assert treebank_form(cnf_tree(tree)).to_string() == TRAIN[1]
    # A refined grammar's tree: the subcategory of a joined chain belongs to the whole chain,
    # so it is projected before the chain is split. Worked by hand from the labels.
    fine = parse_brackets("(S·1 (NP·0 (D·1 mo) (N·0 lanu)) (¤S¤VP·1 (VP¦VI·1 sul) (P·0 .)))")
    assert treebank_form(fine, coarse_name).to_string() == TRAIN[1]
    # A tree with no transform mark (an induced grammar's) is left exactly as it is.
    induced = parse_brackets("(N0·1 (T3 kip) (T1 sul))")
    assert treebank_form(induced, coarse_name) is induced
    # ... unless its grammar is a treebank's: a tree of such a grammar that happens to use no
    # marked symbol is projected like every other tree of it, and an induced grammar's tree
    # is left alone even if a label looks marked. Worked by hand.
    plain = parse_brackets("(S·1 (NP·0 (D·1 mo) (N·0 lanu)) (VP·1 (V·0 orun) (N·1 kip)))")
    assert treebank_form(plain, coarse_name).to_string() == plain.to_string()
    assert treebank_form(plain, coarse_name, treebank=True).to_string() == \
        "(S (NP (D mo) (N lanu)) (VP (V orun) (N kip)))"
    assert treebank_form(fine, coarse_name, treebank=False) is fine


@pytest.fixture(scope="module")
def refined(tmp_path_factory):
    folder = tmp_path_factory.mktemp("treebank")
    text = folder / "dev.txt"
    text.write_text("".join(" ".join(parse_brackets(t).leaves()) + "\n" for t in HELD_OUT),
                    encoding="utf-8")
    run, _, dev = refine_on_trees(folder, TRAIN * 4, HELD_OUT)
    return run, dev, text


@pytest.mark.parametrize("decoder", ["max-rule-product", "viterbi"])
def test_parse_writes_the_original_labels_and_arity(refined, decoder, capsys):
    run, _, text = refined
    assert main(["parse", str(run), str(text), "--decoder", decoder]) == 0
    out = capsys.readouterr().out.splitlines()
    # Reference: the hand-written held-out trees. Every tree of this grammar has the
    # shape S -> NP VP P; the words fix the rest, so the best tree is the gold one.
    assert out == HELD_OUT
    for line in out:
        assert "¤" not in line and "¦" not in line and "·" not in line


def test_parse_and_evaluate_agree_with_refinements_labeled_f1(refined, tmp_path, capsys):
    run, dev, text = refined
    assert main(["parse", str(run), str(text), "--decoder", "max-rule-product"]) == 0
    pred = tmp_path / "pred.trees"
    pred.write_text(capsys.readouterr().out, encoding="utf-8")
    # Refinement's labeled F1 counts every phrase span of width >= 2, the whole sentence and
    # punctuation included (refine.run.labeled_f1): the same conventions for evaluate.
    assert main(["evaluate", str(pred), str(dev), "--labeled", "yes", "--include-whole-span",
                 "--keep-punctuation", "--no-tags", "--json", "-"]) == 0
    scores = json.loads(capsys.readouterr().out)
    last = json.loads((run / "metrics.jsonl").read_text().splitlines()[-1])
    assert scores["brackets"]["labeled"]["corpus_f1"] == pytest.approx(last["heldout/labeled_f1"])
    assert last["heldout/labeled_f1"] == pytest.approx(1.0)   # hand-checked: gold trees back


def test_export_writes_the_treebank_form(refined, tmp_path):
    run, _, text = refined
    brackets, conllu = tmp_path / "out.trees", tmp_path / "out.conllu"
    assert main(["export", str(run), "--to", "brackets", "--corpus", str(text),
                 "--out", str(brackets)]) == 0
    assert brackets.read_text(encoding="utf-8").splitlines() == HELD_OUT   # as parse above
    assert main(["export", str(run), "--to", "conllu", "--corpus", str(text),
                 "--out", str(conllu)]) == 0
    lines = conllu.read_text(encoding="utf-8").splitlines()
    assert f"# induced_tree = {HELD_OUT[0]}" in lines
    # The tag column holds the treebank's tags (N, VI), not the joined chains NP¦N, VP¦VI.
    tags = [row.split("\t")[4] for row in lines if row and not row.startswith("#")]
    assert tags[:3] == ["N", "VI", "P"]


def test_sample_writes_the_treebank_form(refined, capsys):
    # Every tree the grammar generates is one of the treebank's shapes over its words: S over
    # NP VP P (common to all three training trees), with the original labels and no marks.
    run, _, _ = refined
    assert main(["sample", str(run), "-n", "20", "--seed", "3"]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert len(lines) == 20
    for line in lines:
        words, tree = line.split("\t")
        assert "¤" not in tree and "¦" not in tree and "·" not in tree
        top = parse_brackets(tree)
        assert [c.label for c in top.children] == ["NP", "VP", "P"]
        assert " ".join(top.leaves()) == words
