"""Training warns when most dev tokens are not training words: the dev likelihood then scores
the unknown word more than the text. Lines of the invented Velmor language, the dev set written
as a text whose words run together with their punctuation (a tokenization unlike training's)."""

from __future__ import annotations

from test_train_fixtures import base_overrides
from treewright.train import load_train_config
from treewright.train.data import load_data

TRAIN = "ta ferro orun kip\nta ferro mo lanu\n"


def _notes(tmp_path, dev_text: str) -> list[str]:
    train = tmp_path / "train.txt"
    train.write_text(TRAIN, encoding="utf-8")
    dev = tmp_path / "dev.txt"
    dev.write_text(dev_text, encoding="utf-8")
    return load_data(load_train_config(None, base_overrides(tmp_path, train, dev))).notes


def test_most_dev_tokens_unknown_draws_a_warning(tmp_path):
    # Hand-counted: 4 dev tokens, of which "taferro", "orun." and "lanu." are not training
    # words: 3 of 4 = 75.00%; every training token is a training word (0.00%).
    notes = _notes(tmp_path, "taferro orun.\nkip lanu.\n")
    warning = [n for n in notes if n.startswith("warning:")]
    assert len(warning) == 1
    assert "75.00% of the dev tokens of" in warning[0] and "(training: 0.00%)" in warning[0]
    assert "tokenized as the training text" in warning[0]


def test_half_the_dev_tokens_unknown_is_not_most(tmp_path):
    # Hand-counted: "taferro" and "orun." unknown, "kip" and "lanu" known: 2 of 4 = 50.00%.
    notes = _notes(tmp_path, "taferro orun.\nkip lanu\n")
    assert any("unknown-token rate 50.00%" in n for n in notes)
    assert not any(n.startswith("warning:") for n in notes)
