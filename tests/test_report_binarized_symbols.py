"""The report's symbol cards of a refined treebank grammar group the intermediate symbols of the
binarization (¤...) under the phrase they belong to, as its drawn trees already hide them.

Reference: `corpus.transforms.binarize` names the intermediate nodes of a phrase; here the
three-child VP of a hand-made treebank is the only phrase that needs one, so every ¤ symbol of
the refined grammar belongs to VP (hand-checked), and every other symbol keeps its own card.
"""

from __future__ import annotations

import io
import re

from treewright.corpus import BIN_MARK, binarize, parse_brackets
from treewright.grammar import coarse_name, load_grammar
from treewright.refine import load_refine_config, refine
from treewright.report.html import binarization_parent, grammar_section

TREES = ["(ROOT (S (NP (N tasko)) (VP (V selim) (NP (N dorva)) (ADV ko))))",
         "(ROOT (S (NP (N dorva)) (VP (V merun) (NP (N tasko)) (ADV ko))))",
         "(ROOT (S (NP (N tasko)) (VP (V selim) (NP (N tasko)))))"]


def test_intermediate_symbols_are_grouped_under_their_phrase(tmp_path):
    path = tmp_path / "train.trees"
    path.write_text("\n".join(TREES) + "\n", encoding="utf-8")
    cfg = load_refine_config(None, ["data.start=treebank", f"data.train={path}",
                                    f"data.dev={path}", "refine.cycles=1",
                                    "refine.em_iterations=2", "refine.smoothed_iterations=1",
                                    f"output.run_dir={tmp_path / 'run'}",
                                    "output.stdout_metrics=false", "output.parse_f1=false"])
    grammar = load_grammar(refine(cfg, tmp_path / "run", stream=io.StringIO()).grammar_path)
    # The reference's intermediate labels: those binarize gives the treebank's trees, in the
    # refine defaults' form (right-factored, one child of horizontal context).
    made = {node.label for t in TREES
            for node in binarize(parse_brackets(t)[0], "right", 1).subtrees()
            if node.label.startswith(BIN_MARK)}
    assert made and all(label.startswith(BIN_MARK + "VP") for label in made)
    intermediate = [s for s in grammar.symbols if coarse_name(s).startswith(BIN_MARK)]
    assert intermediate and {coarse_name(s) for s in intermediate} <= made
    assert all(binarization_parent(s) == "VP" for s in intermediate)
    html = grammar_section(grammar, top=3)
    main, _, grouped = html.partition("<details")
    headers = re.findall(r"<th colspan='2'>([^<]*)<span", main)
    assert sorted(headers) == sorted(s for s in grammar.symbols if s not in intermediate)
    assert "<summary>VP: " in grouped and grouped.count("<details") == 0
    assert sorted(re.findall(r"<th colspan='2'>([^<]*)<span", grouped)) == sorted(intermediate)


def test_binarization_parent_reads_the_marks():
    # Hand-worked from the label scheme of corpus.transforms (¤ parent ¤ context, ˆ ancestors).
    assert binarization_parent("¤NP¤DT·1") == "NP"
    assert binarization_parent("¤NPˆS¤DT¤JJ") == "NP"
    assert binarization_parent("NP·1") is None
    assert binarization_parent("NP¦N·0") is None
