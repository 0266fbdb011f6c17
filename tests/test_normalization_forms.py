"""One word written in two Unicode normalization forms: readers keep words as written (the
user's data is never changed), so each form is a word of its own; training and `segment` say
so in their logs, naming the code points, rather than splitting a word in silence.

Reference: the Unicode Standard's canonical equivalence, through Python's `unicodedata`
(U+00E9 and U+0065 U+0301 are canonically equivalent; so are U+212B ANGSTROM SIGN and U+00C5,
a singleton decomposition, from memory of UnicodeData.txt and checked here by NFC itself; the
ligature U+FB01 is only compatibility-equivalent to "fi", so NFC keeps it apart). The texts are
invented lines of the Velmor language (`test_train_fixtures`)."""

from __future__ import annotations

import json
import unicodedata

import pytest

from test_train_fixtures import base_overrides
from treewright.adaptor.config import load_segment_config
from treewright.adaptor.run import segment_words
from treewright.corpus import normalization_note, normalization_variants
from treewright.train import load_train_config
from treewright.train.data import load_data

COMPOSED, DECOMPOSED = "ferr\u00e9", "ferre\u0301"     # look alike, differ in code points
ANGSTROM, A_RING = "\u212b", "\u00c5"
LIGATURE = "\ufb01"


def test_the_reference_agrees_with_what_the_test_assumes():
    assert COMPOSED != DECOMPOSED
    assert unicodedata.normalize("NFC", DECOMPOSED) == COMPOSED
    assert unicodedata.normalize("NFC", ANGSTROM) == A_RING
    assert unicodedata.normalize("NFC", LIGATURE) == LIGATURE != "fi"


def test_variants_group_canonically_equivalent_words_only():
    words = ["ta", COMPOSED, "kip", DECOMPOSED, ANGSTROM, "fi", A_RING, LIGATURE, COMPOSED]
    assert normalization_variants(words) == [[COMPOSED, DECOMPOSED], [ANGSTROM, A_RING]]
    assert normalization_variants(["ta", "kip", "fi", LIGATURE]) == []
    note = normalization_note(normalization_variants(words), "training word")
    assert note.startswith("2 training words are each written in two or more Unicode "
                           "normalization forms")
    assert normalization_note([[COMPOSED, DECOMPOSED]], "character").startswith(
        "1 character is written in two or more")
    # The first group, with each form's code points.
    assert "'ferr\u00e9' (U+0066 U+0065 U+0072 U+0072 U+00E9)" in note
    assert "(U+0066 U+0065 U+0072 U+0072 U+0065 U+0301)" in note
    assert normalization_note([], "training word") is None


@pytest.mark.parametrize("stream", [False, True])
def test_training_notes_a_word_read_in_two_forms(tmp_path, stream):
    corpus = tmp_path / "mixed.txt"
    corpus.write_text(f"ta {COMPOSED} orun kip\nmo {DECOMPOSED} sul\nta lanu sul\n",
                      encoding="utf-8")
    extra = {"data.stream_chunk": 2, "train.method": "online_em"} if stream else {}
    cfg = load_train_config(None, base_overrides(tmp_path, corpus, None, **extra))
    data = load_data(cfg)
    notes = [n for n in data.notes if "normalization forms" in n]
    assert len(notes) == 1 and notes[0].startswith("1 training word is written")
    # Nothing is changed: both forms are words of the vocabulary, as written.
    assert COMPOSED in data.vocab and DECOMPOSED in data.vocab
    plain = tmp_path / "plain.txt"
    plain.write_text(f"ta {COMPOSED} orun kip\nmo {COMPOSED} sul\n", encoding="utf-8")
    cfg = load_train_config(None, base_overrides(tmp_path, plain, None, **extra))
    assert not [n for n in load_data(cfg).notes if "normalization forms" in n]


def test_segment_notes_a_character_read_in_two_forms(tmp_path):
    text = tmp_path / "lines.txt"
    text.write_text(f"ta {COMPOSED} kip\nmo {DECOMPOSED}\n", encoding="utf-8")
    config = tmp_path / "segment.yaml"
    config.write_text(json.dumps({"data": {"text": str(text)},
                                  "sampler": {"sweeps": 1, "seed": 0},
                                  "output": {"tensorboard": False}}))
    segment_words(load_segment_config(config), tmp_path / "run")
    log = (tmp_path / "run" / "segment.log").read_text(encoding="utf-8")
    # The characters (grapheme clusters) é and e + U+0301 are one letter in two forms.
    assert "1 character is written in two or more Unicode normalization forms" in log
    assert "'\u00e9' (U+00E9) and 'e\u0301' (U+0065 U+0301)" in log
    segmentation = (tmp_path / "run" / "segmentation.txt").read_text(encoding="utf-8")
    assert DECOMPOSED in segmentation.replace(" ", "")    # written back as read
