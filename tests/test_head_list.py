"""The head-word bias of lexicalized training (`bias.head_weight`, `bias.head_list`): which words
a list names, and the head potentials each batch carries.

References: the function-word tags of Universal Dependencies (ADP, AUX, CCONJ, DET, PART, SCONJ
and PUNCT: the words the guidelines attach by aux, cop, case, mark, det, cc and punct to the
content word of their phrase; de Marneffe et al. 2021, written from memory of the
guidelines), with the older universal tagset's CONJ, PRT and "." (Petrov, Das & McDonald
2012, from memory), and the linear fade of `bias.anneal_epochs` recomputed by hand. What a head
potential does to log Z is checked against enumeration in tests/test_params_lexicalized.py.
"""

from __future__ import annotations

import pytest
import torch

from test_train_fixtures import base_overrides
from treewright.errors import InputError
from treewright.train import load_train_config
from treewright.train.curriculum import Curriculum
from treewright.train.data import MemoryBudget, load_data, read_head_list

CONLLU = """\
1\tkel\t_\tDET\t_\t_\t2\tdet\t_\t_
2\tmarun\t_\tNOUN\t_\t_\t4\tobl\t_\t_
3\tpa\t_\tADP\t_\t_\t2\tcase\t_\t_
4\tsovet\t_\tVERB\t_\t_\t0\troot\t_\t_

1\tmarun\t_\tNOUN\t_\t_\t2\tnsubj\t_\t_
2\tsovet\t_\tVERB\t_\t_\t0\troot\t_\t_
3\tna\t_\tAUX\t_\t_\t2\taux\t_\t_

"""


def _config(tmp_path, *extra, tags=True):
    path = tmp_path / "train.conllu"
    path.write_text(CONLLU, encoding="utf-8")
    values = dict(e.split("=", 1) for e in extra)
    values.update({"data.format": "conllu", "model.parameterization": "lexicalized",
                   "train.method": "gradient", "model.head_classes": 2})
    if tags:
        values["data.tag_mode"] = "true"
    return load_train_config(None, base_overrides(tmp_path, path, None, **values))


def test_ud_function_names_the_function_tags_and_batches_carry_their_faded_bias(tmp_path):
    cfg = _config(tmp_path, "bias.head_weight=-1.5", "bias.head_list=ud-function",
                  "bias.anneal_epochs=2")
    data = load_data(cfg)
    named = {w: x for w, x in zip(data.vocab.words, data.head_list.tolist()) if x}
    assert named == {"DET": -1.5, "ADP": -1.5, "AUX": -1.5}   # the function tags; not NOUN, VERB
    curriculum = Curriculum(cfg, MemoryBudget(cfg, torch.float64), shuffle=False)
    want = torch.tensor([[-1.5, 0.0, -1.5, 0.0], [0.0, 0.0, -1.5, 0.0]], dtype=torch.float64)
    for epoch, scale in ((0, 1.0), (1, 0.5)):   # linear from full strength to 0 at epoch 2
        batch = curriculum.batch(data, [0, 1], epoch, torch.float64)
        torch.testing.assert_close(batch.head_bias, want * scale, rtol=0, atol=0)
    assert curriculum.batch(data, [0, 1], 2, torch.float64).head_bias is None
    assert any("head list (the function-word tags of Universal Dependencies): 3 words in the "
               "training vocabulary, 7 listed but unused; the log-weight of each dependent they "
               "take in training: -1.5 for 3" in note for note in data.notes)


def test_batches_carry_the_faded_arc_length_weight(tmp_path):
    # bias.arc_length fades with bias.anneal_epochs as the other biases do (linear from full
    # strength to 0 at epoch 3, recomputed by hand), and a batch without it carries 0.
    cfg = _config(tmp_path, "bias.arc_length=-1.2", "bias.anneal_epochs=3")
    data = load_data(cfg)
    curriculum = Curriculum(cfg, MemoryBudget(cfg, torch.float64), shuffle=False)
    for epoch, want in ((0, -1.2), (1, -0.8), (2, -0.4), (3, 0.0), (5, 0.0)):
        batch = curriculum.batch(data, [0, 1], epoch, torch.float64)
        assert batch.arc_length == pytest.approx(want, abs=1e-15)
        assert batch.head_bias is None
    plain = Curriculum(_config(tmp_path), MemoryBudget(cfg, torch.float64), shuffle=False)
    assert plain.batch(data, [0, 1], 0, torch.float64).arc_length == 0.0


def test_ud_function_also_names_the_older_universal_tags(tmp_path):
    # A treebank tagged with the 12 tags of Petrov, Das & McDonald 2012 (as the Turkish
    # treebank of the benchmark is): CONJ and PRT are its conjunctions and particles.
    cfg = _config(tmp_path, "bias.head_weight=-1", "bias.head_list=ud-function")
    path = tmp_path / "older.conllu"
    path.write_text(CONLLU.replace("ADP", "PRT").replace("\tAUX\t", "\tCONJ\t"),
                    encoding="utf-8")
    cfg.data.train = path
    data = load_data(cfg)
    named = {w for w, x in zip(data.vocab.words, data.head_list.tolist()) if x}
    assert named == {"DET", "PRT", "CONJ"}


def test_a_word_list_is_read_as_the_training_text_is(tmp_path):
    # A word without a weight of its own takes bias.head_weight; the last of two entries wins.
    words = tmp_path / "listed.txt"
    words.write_text("\ufeff# particles\n  PA \n\nKel 0.5\nsovet  2\nsovet 1.25\n",
                     encoding="utf-8")
    assert read_head_list(words, lowercase=True) == [("pa", None), ("kel", 0.5),
                                                     ("sovet", 2.0), ("sovet", 1.25)]
    assert read_head_list(words, lowercase=False)[:2] == [("PA", None), ("Kel", 0.5)]
    cfg = _config(tmp_path, "bias.head_weight=-1", f"bias.head_list={words}",
                  "data.lowercase=true", "bias.anneal_epochs=4", tags=False)
    data = load_data(cfg)
    batch = Curriculum(cfg, MemoryBudget(cfg, torch.float64), False).batch(
        data, [0, 1], 1, torch.float64)          # kel marun pa sovet / marun sovet na
    torch.testing.assert_close(batch.head_bias, 0.75 * torch.tensor(
        [[0.5, 0.0, -1.0, 1.25], [0.0, 1.25, 0.0, 0.0]], dtype=torch.float64))
    assert any("; the log-weight of each dependent they take in training: -1 for 1, 0.5 for 1, "
               "1.25 for 1" in note for note in data.notes)


@pytest.mark.parametrize("text,message", [
    ("# nothing\n\n", "lists no words"),
    ("pa\nkel na 2\n", "line 2: a word and at most one weight per line, found 3 fields"),
    ("pa\n\nkel heavy\n", "line 3: the weight of 'kel' is not a finite number: 'heavy'"),
    ("kel inf\n", "line 1: the weight of 'kel' is not a finite number: 'inf'"),
])
def test_bad_word_files_are_refused_with_their_line(tmp_path, text, message):
    words = tmp_path / "listed.txt"
    words.write_text(text, encoding="utf-8")
    with pytest.raises(InputError) as err:
        read_head_list(words, lowercase=False)
    assert message in str(err.value) and str(words) in str(err.value)


@pytest.mark.parametrize("text,weight,message", [
    ("zzz\n", "-1", "none of the words of bias.head_list occurs in the training vocabulary"),
    ("kel\npa 0\n", "0", "every listed word weighs 0"),
])
def test_lists_that_would_change_nothing_are_refused(tmp_path, text, weight, message):
    words = tmp_path / "listed.txt"
    words.write_text(text, encoding="utf-8")
    cfg = _config(tmp_path, f"bias.head_weight={weight}", f"bias.head_list={words}",
                  tags=False)
    with pytest.raises(InputError) as err:
        load_data(cfg)
    assert message in str(err.value) and str(words) in str(err.value)


def test_padding_takes_no_bias_whatever_word_id_it_holds(tmp_path):
    # Every word of the vocabulary listed, so the padding id (0) is a listed word too: the
    # padded position of the shorter sentence must still carry 0.
    words = tmp_path / "listed.txt"
    words.write_text("kel\nmarun\npa\nsovet\nna\n", encoding="utf-8")
    cfg = _config(tmp_path, "bias.head_weight=0.5", f"bias.head_list={words}", tags=False)
    data = load_data(cfg)
    batch = Curriculum(cfg, MemoryBudget(cfg, torch.float64), False).batch(
        data, [0, 1], 0, torch.float64)
    assert batch.ids.shape == (2, 4) and int(batch.lengths[1]) == 3
    torch.testing.assert_close(batch.head_bias, torch.tensor(
        [[0.5, 0.5, 0.5, 0.5], [0.5, 0.5, 0.5, 0.0]], dtype=torch.float64))
