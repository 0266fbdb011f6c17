"""Shape classes of rare words (refine.signatures): names, their meaning, and no clash with words.

References: the cue definitions of the module docstring, recomputed here for every word of the
Turkish Web Treebank (turkish-treebanks package, `web` section, read with the
`conllu` package) and for every short string over a small alphabet (brute-force enumeration);
hand-worked names for a few words of the invented language Kethravi.
"""

from __future__ import annotations

import itertools
import sysconfig
from pathlib import Path

import pytest

from treewright.refine import UNKNOWN, WordClasses, signature
from treewright.refine.signatures import is_class_name


def cues(word: str) -> tuple[bool, bool, bool, str]:
    """(capital first, has a digit, has a hyphen, two-letter ending or ""), from the docstring."""
    tail = word[-2:].lower()
    return (word[:1].isupper(), any(c.isdigit() for c in word), "-" in word,
            tail if len(word) > 3 and tail.isalpha() else "")


def read_name(name: str) -> tuple[bool, bool, bool, str]:
    """The cues a class name states, read back from its text."""
    if name == UNKNOWN:
        return (False, False, False, "")
    assert name[0] == "\u27ea" and name[-1] == "\u27eb"
    parts = name[1:-1].split("\u00b7")
    ending = [p[1:] for p in parts if p.startswith("\u2026")]
    known = {"Capital", "digit", "hyphen"}
    assert all(p in known or p.startswith("\u2026") for p in parts)
    order = [p for p in parts if p in known]
    assert order == sorted(order, key=["Capital", "digit", "hyphen"].index)  # fixed order
    return ("Capital" in parts, "digit" in parts, "hyphen" in parts, ending[0] if ending else "")


def test_hand_worked_names():
    # Worked by hand from the module docstring.
    assert signature("Orvek") == "⟪Capital·…ek⟫"
    assert signature("Hessa-7") == "⟪Capital·digit·hyphen⟫"
    assert signature("1990") == "⟪digit⟫"
    assert signature("ko-tulmen") == "⟪hyphen·…en⟫"
    assert signature("Vorro9ed") == "⟪Capital·digit·…ed⟫"
    assert signature("dok") == UNKNOWN  # too short for an ending, no other cue
    assert signature("brosk!") == UNKNOWN  # ends in a non-letter


def test_every_name_states_exactly_the_cues_of_its_words():
    # Brute force: every string of up to 5 characters over a small alphabet.
    alphabet = "aB7-é"
    names: dict[tuple, str] = {}
    for n in range(1, 6):
        for chars in itertools.product(alphabet, repeat=n):
            word = "".join(chars)
            name = signature(word)
            assert read_name(name) == cues(word)
            # One name per set of cues and one set of cues per name.
            assert names.setdefault(cues(word), name) == name
    assert len(set(names.values())) == len(names)


def _turkish_forms() -> list[str]:
    conllu = pytest.importorskip("conllu")
    folder = Path(sysconfig.get_paths()["purelib"]) / "data"
    if not (folder / "web.conllu").exists():
        pytest.skip("turkish-treebanks is not installed")
    forms = []
    for name in ("web.conllu",):
        for sentence in conllu.parse((folder / name).read_text(encoding="utf-8")):
            forms += [t["form"] for t in sentence]
    return forms


def test_names_never_meet_the_words_of_a_real_treebank():
    forms = _turkish_forms()
    assert len(forms) > 10000
    assert not any(is_class_name(w) for w in forms)
    for w in set(forms):
        name = signature(w)
        assert is_class_name(name) and read_name(name) == cues(w)


def test_a_word_written_like_a_class_name_is_never_kept_as_itself():
    tokens = ["⟪digit⟫"] * 5 + ["<unk>"] * 5 + ["ko"] * 5 + ["1990", "2024", "77"]
    classes = WordClasses.fit(tokens, rare_count=1, signature_min_count=3)
    assert classes.known == frozenset({"ko"})
    assert classes.signatures == frozenset({"⟪digit⟫"})  # from the three numbers
    # The lookalikes go through their own shape (no cue: UNKNOWN), never to the digit class.
    assert classes("⟪digit⟫") == UNKNOWN and classes("<unk>") == UNKNOWN
    assert classes("314") == "⟪digit⟫" and classes("ko") == "ko"
