"""Grammars saved before the subcategory mark became NAME·k wrote NAME@k; they still load as
refined grammars, with one notice.

Reference: a four-rule old-style grammar worked by hand; its only parse of "orvek selim" under
the coarse symbols is (S (NP orvek) (VP selim)), with S·0 -> NP·0 VP·1 at 0.6 and
S·0 -> NP·1 VP·1 at 0.4 (NP·1 emits only "tasko", so the second has probability 0 here).
"""

from __future__ import annotations

import json
import logging

import pytest

from treewright.decode import decode
from treewright.errors import InputError
from treewright.export.jsonformat import grammar_from_json, grammar_json_text
from treewright.grammar import _digest, load_grammar, parse_grammar, split_name

OLD = """@start ROOT
ROOT -> S@0 1.0
S@0 -> NP@0 VP@1 0.6
S@0 -> NP@1 VP@1 0.4
NP@0 -> "orvek" 1.0
NP@1 -> "tasko" 1.0
VP@1 -> "selim" 1.0"""


def _sealed(body: str) -> str:
    # The way treewright sealed a saved grammar (grammar.py docstring): @format first, and the
    # checksum of the lines before it last.
    lines = ["@format 1"] + body.splitlines()
    return "\n".join(lines + ["# checksum sha256:" + _digest(lines)]) + "\n"


def _notices(caplog) -> list[str]:
    return [r.getMessage() for r in caplog.records if "NAME@k" in r.getMessage()]


def test_an_old_saved_grammar_reads_as_refined(tmp_path, caplog):
    path = tmp_path / "old.pcfg"
    path.write_text(_sealed(OLD), encoding="utf-8")
    with caplog.at_level(logging.WARNING, logger="treewright"):
        grammar = load_grammar(path)
    assert grammar.nonterminals == ["S·0"]
    assert grammar.preterminals == ["NP·0", "NP·1", "VP·1"]
    assert [split_name(s) for s in grammar.symbols] == [("S", 0), ("NP", 0), ("NP", 1),
                                                        ("VP", 1)]
    notices = _notices(caplog)
    assert len(notices) == 1 and str(path) in notices[0] and "4 symbols" in notices[0]
    # The max-rule-product decoder projects subcategories to coarse symbols (hand-worked).
    tree = decode(grammar, [["orvek", "selim"]], decoder="max-rule-product")[0].tree
    assert tree.to_string() == "(S (NP orvek) (VP selim))"
    # Saved again, the grammar uses the new mark and loads without a notice.
    caplog.clear()
    with caplog.at_level(logging.WARNING, logger="treewright"):
        again = parse_grammar(grammar.to_text())
    assert again.symbols == grammar.symbols and not _notices(caplog)
    assert "@" not in "".join(grammar.to_text().splitlines()[2:-1])


def test_an_old_json_export_reads_as_refined(caplog):
    data = json.loads(grammar_json_text(parse_grammar(OLD)).replace("·", "@"))
    assert data["nonterminals"] == ["S@0"]  # the export as it was written before
    caplog.clear()
    with caplog.at_level(logging.WARNING, logger="treewright"):
        grammar = grammar_from_json(data, "old.json").grammar
    assert grammar.symbols == ["S·0", "NP·0", "NP·1", "VP·1"]
    assert len(_notices(caplog)) == 1


def test_names_that_are_not_the_old_mark_stay_as_they_are(caplog):
    text = OLD.replace("S@0", "S@x").replace("NP@0", "NP@")
    with caplog.at_level(logging.WARNING, logger="treewright"):
        grammar = parse_grammar(text)
    assert "S@x" in grammar.symbols and "NP@" in grammar.symbols
    assert "NP·1" in grammar.symbols  # the others are still read as subcategories


def test_both_marks_for_one_symbol_are_refused():
    with pytest.raises(InputError) as err:
        parse_grammar(OLD + '\nNP·0 -> "dorva" 1.0\nS@0 -> NP·0 VP@1 0.0', source="g.pcfg")
    assert "g.pcfg" in str(err.value) and "NP·0" in str(err.value)
