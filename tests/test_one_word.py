"""One-word sentences: the grammars training induces give them no tree, so training counts
them with the reason (and stops on a corpus of nothing else), and `parse` says why it has no
tree for one.

The data are lines of the invented Velmor language (`test_train_fixtures`)."""

from __future__ import annotations

import json

import pytest
import torch

from test_train_fixtures import base_overrides
from treewright.cli import main
from treewright.errors import InputError
from treewright.params import PARAMETERIZATIONS
from treewright.train import load_train_config, train
from treewright.train.data import load_data

SENTENCES = ["ta ferro orun kip", "mo lanu sul"]   # 4 and 3 words
ONE_WORD = ["kip", "sul", "vesk"]


def _write(path, lines):
    path.write_text("".join(line + "\n" for line in lines), encoding="utf-8")
    return path


@pytest.mark.parametrize("method", ["em", "gradient"])
def test_a_corpus_of_one_word_sentences_stops_with_the_reason(tmp_path, method):
    corpus = _write(tmp_path / "one.txt", ONE_WORD)
    cfg = load_train_config(None, base_overrides(tmp_path, corpus, None, **{
        "train.method": method, "train.epochs": 1}))
    with pytest.raises(InputError) as info:
        train(cfg, tmp_path / "run")
    message = str(info.value)
    # Hand-counted: three lines read, all three one word.
    assert message.startswith(str(corpus))
    assert "every training sentence used (3) has one word" in message
    assert "no rule for a one-word tree" in message
    assert not (tmp_path / "run" / "grammar.pcfg").exists()   # nothing trained on nothing


def test_one_word_sentences_are_counted_with_the_reason(tmp_path):
    lines = [ONE_WORD[0], SENTENCES[0], ONE_WORD[1], SENTENCES[1], ONE_WORD[2]]
    corpus = _write(tmp_path / "mixed.txt", lines)
    cfg = load_train_config(None, base_overrides(tmp_path, corpus, None,
                                                 **{"train.epochs": 2}))
    data = load_data(cfg)
    report = " ".join(data.notes)
    # Hand-counted from `lines`: 5 read and used (10 tokens), 3 of them one word. They are kept
    # (their words stay in the vocabulary, the batches are those of earlier versions), and the
    # note says they add nothing.
    assert "read 5 sentences" in report and "used 5 sentences, 10 tokens" in report
    assert "3 of the 5 training sentences used have one word and add nothing" in report
    assert "no rule for a one-word tree" in report
    assert len(data.train_ids) == 5
    trainer = train(cfg, tmp_path / "run")
    log = (trainer.run_dir / "train.log").read_text(encoding="utf-8")
    assert "3 of the 5 training sentences used have one word" in log
    first = json.loads((trainer.run_dir / "metrics.jsonl").read_text().splitlines()[0])
    # The epoch's parsed sentences are the two longer ones; the three one-word ones unparsed.
    assert first["train/sentences"] == 2 and first["train/unparsed"] == 3


def _one_word_logz(name: str) -> float:
    cfg = load_train_config(None, [
        "data.train=unused.txt", f"model.parameterization={name}", "train.method=gradient",
        "model.nonterminals=2",
        "model.preterminals=3", "model.embedding_dim=8", "model.head_classes=2"])
    model = PARAMETERIZATIONS[name].from_options(cfg.model, 4, torch.Generator().manual_seed(0),
                                                 torch.float64)
    logz, _ = model.log_partition(torch.tensor([[1]]), torch.tensor([1]))
    return float(logz.detach()[0])


@pytest.mark.parametrize("name", ["tabular", "neural", "lexicalized"])
def test_the_flag_says_what_the_engine_does_with_one_word(name):
    # Reference: log Z of a one-word sentence from the model itself (finite: some tree covers
    # it; -inf: none), against the class flag that training reads.
    logz = _one_word_logz(name)
    assert (logz > float("-inf")) == PARAMETERIZATIONS[name].parses_one_word
    assert PARAMETERIZATIONS[name].parses_one_word == (name == "lexicalized")


INDUCTION = """@start ROOT
ROOT -> S 1.0
S -> A A 1.0
A -> "ka" 0.5
A -> "lu" 0.5
"""

GENERAL = """@start ROOT
ROOT -> S 1.0
S -> A A 0.5
S -> "ka" 0.5
A -> "ka" 0.5
A -> "lu" 0.5
"""


def test_parse_says_a_one_word_line_has_no_tree_in_the_induction_layout(tmp_path, capsys):
    text = _write(tmp_path / "in.txt", ["ka", "ka lu"])
    grammar = tmp_path / "induced.pcfg"
    grammar.write_text(INDUCTION, encoding="utf-8")
    assert main(["parse", str(grammar), str(text)]) == 0
    out, err = capsys.readouterr()
    # Worked by hand: S -> A A is the only way down from the root, so "ka" has no tree.
    assert out.splitlines() == ["(NOPARSE ka)", "(S (A ka) (A lu))"]
    assert f"{text}, line 1: no parse (one word: the grammar has no rule for a one-word " \
        "tree" in err
    # A general CNF grammar whose S emits "ka" parses the same line (S -> "ka"), and says
    # nothing about one word.
    general = tmp_path / "general.pcfg"
    general.write_text(GENERAL, encoding="utf-8")
    assert main(["parse", str(general), str(text)]) == 0
    out, err = capsys.readouterr()
    assert out.splitlines()[0] == "(S ka)"
    assert "one word" not in err


def test_parse_names_the_words_read_as_the_unknown_token_when_no_tree_covers_them(tmp_path,
                                                                                  capsys):
    # Worked by hand: only B emits the unknown token and nothing reaches B from the root, so
    # "ka zu" ("zu" read as <unk>) has no tree, and the reason names "zu"; "ka lu" parses.
    grammar = tmp_path / "unk.pcfg"
    grammar.write_text('@start ROOT\n@unknown "<unk>"\nROOT -> S 1.0\nS -> A A 1.0\n'
                       'A -> "ka" 0.5\nA -> "lu" 0.5\nB -> "<unk>" 1.0\n', encoding="utf-8")
    text = _write(tmp_path / "in.txt", ["ka zu", "ka lu"])
    assert main(["parse", str(grammar), str(text)]) == 0
    out, err = capsys.readouterr()
    assert out.splitlines() == ["(NOPARSE ka zu)", "(S (A ka) (A lu))"]
    assert f"{text}, line 1: no parse (no tree covers it; words read as the grammar's <unk>: " \
        "['zu'])" in err
