"""The grammar text format: exact round trips and clear errors naming file and line."""

from __future__ import annotations

import math

import pytest
import torch

from _grammars import random_grammar
from treewright.errors import InputError
from treewright.grammar import load_grammar, parse_grammar
from treewright.inference import score


def test_round_trip_is_exact_in_float64(tmp_path):
    for nt_emit in (False, True):
        g = random_grammar(3, 4, 5, seed=7, nt_emit=nt_emit, sparsity=0.3)
        path = tmp_path / "g.pcfg"
        g.save(path)
        back = load_grammar(path)
        assert back.to_text() == g.to_text()
        # Same symbols in the same order and bit-identical probabilities, so identical scores.
        assert back.symbols == g.symbols
        for a, b in ((g.root, back.root), (g.binary, back.binary), (g.lexical, back.lexical)):
            assert torch.equal(a.exp(), b.exp())
        sents = [["w0", "w1", "w2"], ["w3", "w4"]]
        assert [s.logprob for s in score(g, sents, dtype=torch.float64)] == \
            [s.logprob for s in score(back, sents, dtype=torch.float64)]


def test_each_left_hand_side_sums_to_one():
    # Fact of the trade (common practice): each left-hand side's probabilities sum to one.
    g = random_grammar(4, 3, 6, seed=2, nt_emit=True)
    assert g.normalization_error() < 1e-12


def test_comments_quotes_and_unknown_token():
    g = parse_grammar('@start S  # top\n@unknown "<unk>"\nS -> A A 1.0\n'
                      'A -> "a#b" 0.5 # a word with a hash\nA -> "say \\"hi\\"" 0.25\n'
                      'A -> "<unk>" 0.25\n')
    assert set(g.vocab.words) == {"a#b", 'say "hi"', "<unk>"}
    (s,) = score(g, [["a#b", "never-seen"]], dtype=torch.float64)
    assert s.logprob == pytest.approx(math.log(0.5 * 0.25))
    assert s.unknown == ["never-seen"]


@pytest.mark.parametrize("text,line,fragment", [
    ("@start S\nS -> A A 1.0\nA -> 'a' 1.0\n", 3, "malformed rule"),
    ("@start S\nS -> A A 1.0\nA -> \"a\" 1.2\n", 3, "outside [0, 1]"),
    ("@start S\nS -> A A 1.0\nA -> \"a\" -0.1\nA -> \"b\" 1.1\n", 3, "outside [0, 1]"),
    ("@start S\nS -> A A 1.0\nA -> \"a\" nan\n", 3, "outside [0, 1]"),
    ("@start S\nS -> A A 1.0\nA -> \"a\" 0.5\nA -> \"b\" 0.4\n", 3, "sum to 0.9"),
    ("@start S\nS -> A B 1.0\nA -> \"a\" 1.0\n", 2, "B is used but has no rules"),
    ("@start S\nS -> A A 1.0\nA -> B\nA -> \"a\" 1.0\n", 3, "malformed rule"),
    ("@start S\nS -> A A 0.5\nS -> A 0.5\nA -> \"a\" 1.0\n", 2, "unary rules and other"),
    ("@begin S\n", 1, "unknown or malformed directive"),
    ("@start S\nS -> A A 1.0\nA -> \"a\" 0.5\nA -> \"a\" 0.5\n", 4, "rule repeated"),
])
def test_malformed_grammars_name_the_line(text, line, fragment):
    with pytest.raises(InputError) as err:
        parse_grammar(text, source="g.pcfg")
    assert err.value.line == line
    assert fragment in str(err.value)
    assert str(err.value).startswith(f"g.pcfg, line {line}: ")


def test_renormalize_rescales_instead_of_refusing():
    g = parse_grammar('@start S\nS -> A A 2.0e-1\nA -> "a" 0.5\nA -> "b" 0.3\n',
                      renormalize=True)
    assert g.normalization_error() < 1e-12
    assert math.exp(float(g.lexical[1, 0])) == pytest.approx(0.5 / 0.8)


def test_grammar_without_a_path_to_words_is_refused():
    with pytest.raises(InputError, match="no tree from the start symbol ever reaches a word"):
        parse_grammar("@start S\nS -> S S 1.0\nA -> \"a\" 1.0\n")


def test_missing_start_and_missing_file(tmp_path):
    with pytest.raises(InputError, match="no start symbol"):
        parse_grammar('S -> A A 1.0\nA -> "a" 1.0\n')
    with pytest.raises(InputError, match="no such grammar file"):
        load_grammar(tmp_path / "absent.pcfg")


def test_a_grammar_too_large_for_free_memory_is_refused_naming_the_file(tmp_path, monkeypatch):
    # The arithmetic of the (NT, S, S) float64 rule tensor: 1 nonterminal over 2 symbols takes
    # 1 * 2 * 2 * 8 = 32 bytes, held RULE_TENSOR_COPIES times as the grammar is built.
    from treewright import grammar as grammar_module
    path = tmp_path / "g.pcfg"
    path.write_text("@start S\nS -> A A 1.0\nA -> \"a\" 1.0\n")
    assert load_grammar(path).binary.shape == (1, 2, 2)
    need = grammar_module.RULE_TENSOR_COPIES * 1 * 2 * 2 * 8
    monkeypatch.setattr(grammar_module, "available_bytes", lambda: need - 1)
    with pytest.raises(InputError) as err:
        load_grammar(path)
    assert err.value.path == str(path) and "(1, 2, 2) tensor" in str(err.value)
    monkeypatch.setattr(grammar_module, "available_bytes", lambda: need)
    assert load_grammar(path).binary.shape == (1, 2, 2)


def test_a_run_whose_symbol_counts_cannot_fit_is_refused_before_its_file_is_read(
        tmp_path, monkeypatch):
    # The run folder's config.yaml gives NT and T: NT x (NT + T)^2 float64 entries held
    # RULE_TENSOR_COPIES times is compared with the free memory before the grammar file (here
    # a small valid one, which would load) is parsed.
    from treewright import grammar as grammar_module
    from treewright.export import open_grammar
    from treewright.export import source as source_module
    run = tmp_path / "run"
    run.mkdir()
    (run / "grammar.pcfg").write_text("@start S\nS -> A A 1.0\nA -> \"a\" 1.0\n")
    (run / "config.yaml").write_text("model:\n  nonterminals: 1024\n  preterminals: 2048\n")
    need = grammar_module.RULE_TENSOR_COPIES * 1024 * 3072 ** 2 * 8
    monkeypatch.setattr(grammar_module, "available_bytes", lambda: need - 1)

    def refuse(path):
        raise AssertionError("the grammar file was read")

    monkeypatch.setattr(source_module, "load_grammar", refuse)
    with pytest.raises(InputError) as err:
        open_grammar(run)
    assert err.value.path == str(run / "grammar.pcfg") and "(1024, 3072, 3072)" in str(err.value)
