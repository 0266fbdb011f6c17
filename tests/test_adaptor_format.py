"""The grammar text format's `@adapted` lines (issue 23): read, written back, and checked."""

from __future__ import annotations

import pytest
import torch

from treewright.errors import InputError
from treewright.grammar import parse_grammar

WORDS = """@start ROOT
@adapted Word discount 0.25 concentration 2
ROOT -> Words 0.5
ROOT -> Word 0.5
Words -> Word Words 0.5
Words -> Word Word 0.5
Word -> "a" 0.5
Word -> Char Word 0.5
Char -> "a" 1.0
"""


def test_adapted_lines_are_read_and_written_back_exactly():
    g = parse_grammar(WORDS)
    assert g.adapted == {"Word": (0.25, 2.0)}
    back = parse_grammar(g.to_text())
    assert back.adapted == g.adapted
    assert back.to_text() == g.to_text()
    # The rules are the base grammar, bit for bit the same as without the line.
    plain = parse_grammar(WORDS.replace("@adapted Word discount 0.25 concentration 2\n", ""))
    assert plain.adapted == {}
    assert torch.equal(plain.binary, g.binary) and torch.equal(plain.lexical, g.lexical)
    assert "@adapted" not in plain.to_text()
    assert g.to(torch.float32).adapted == g.adapted


def test_a_grammar_without_adapted_lines_saves_as_before():
    # The text of a plain grammar has no new line: the format of existing files is unchanged.
    plain = parse_grammar('@start S\nS -> A A 1.0\nA -> "a" 1.0\n')
    assert plain.to_text().splitlines()[:3] == ["@format 1", "@start S", "S -> A A 1.0"]


@pytest.mark.parametrize("line,fragment", [
    ("@adapted Word", "malformed directive"),
    ("@adapted Word discount 0.5", "malformed directive"),
    ("@adapted Word concentration 1 discount 0.5", "malformed directive"),
    ('@adapted "Word" discount 0 concentration 1', "malformed directive"),
    ("@adapted Word discount x concentration 1", "are numbers"),
    ("@adapted Word discount 1 concentration 1", "outside [0, 1)"),
    ("@adapted Word discount -0.1 concentration 1", "outside [0, 1)"),
    ("@adapted Word discount nan concentration 1", "outside [0, 1)"),
    # The Pitman-Yor process needs b > -a (Pitman & Yor 1997): b = -a is refused, b = 0 with
    # a = 0 too.
    ("@adapted Word discount 0.5 concentration -0.5", "greater than minus the discount"),
    ("@adapted Word discount 0 concentration 0", "greater than minus the discount"),
    ("@adapted Word discount 0 concentration inf", "must be finite"),
    ("@adapted Nothing discount 0 concentration 1", "Nothing has no rules"),
    ("@adapted ROOT discount 0 concentration 1", "only the unary rules"),
])
def test_bad_adapted_lines_name_the_file_and_line(line, fragment):
    text = WORDS.replace("@adapted Word discount 0.25 concentration 2", line)
    with pytest.raises(InputError) as err:
        parse_grammar(text, source="w.pcfg")
    assert err.value.line == 2
    assert fragment in str(err.value)
    assert str(err.value).startswith("w.pcfg, line 2: ")


def test_a_symbol_adapted_twice_is_refused():
    text = WORDS + "@adapted Word discount 0 concentration 1\n"
    with pytest.raises(InputError, match="adapted twice .first on line 2") as err:
        parse_grammar(text, source="w.pcfg")
    assert err.value.line == 10


def test_the_reference_rule_for_b_allows_negative_concentration():
    # b may be negative when a > 0, as long as b > -a (Pitman & Yor 1997).
    g = parse_grammar(WORDS.replace("discount 0.25 concentration 2",
                                    "discount 0.5 concentration -0.25"))
    assert g.adapted == {"Word": (0.5, -0.25)}
