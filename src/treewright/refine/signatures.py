"""Word shape classes: rare and unknown words fall into classes by their shape, so a refined
grammar parses new text (the unknown-word classes of Petrov et al. 2006 are built from the same
cues: capitalisation, digits, hyphens and the suffix; the classes and their names here are ours).

A class is named by a short description of the shape between the double angle brackets ⟪ ⟫
(U+27EA, U+27EB), its cues in a fixed order, separated by a middle dot (U+00B7):

    ⟪Capital·digit·hyphen·…ed⟫   ⟪Capital·…ek⟫   ⟪digit⟫   ⟪hyphen·…wn⟫

"Capital": the first character is upper case; "digit": some character is a digit; "hyphen":
some character is "-"; "…xy": the word ends in the letters xy (lowercased; only for words longer
than the suffix plus one, and only when those characters are letters). The suffix holds letters
only, so no cue can contain a separator or a bracket and each name stands for one set of cues.
A word with none of these cues falls into UNKNOWN, as do words whose class is too rare.

Names never meet real words: a training word that has the form of a class name (or is UNKNOWN
itself) is never kept as a word of its own; it stands for its shape class, as rare words do.
"""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass
from typing import Iterable

UNKNOWN = "<unk>"   # the class of every word without a cue, or whose shape class is too rare
SUFFIX_LENGTH = 2   # letters of the suffix kept; two already tell much in suffixing languages
OPEN, CLOSE, SEPARATOR, ENDING = "\u27ea", "\u27eb", "\u00b7", "\u2026"


def signature(word: str) -> str:
    """The shape class of `word` (see the module docstring), e.g. "⟪Capital·…ar⟫", "⟪digit⟫",
    "⟪hyphen·…ed⟫"; UNKNOWN when the word shows none of the cues."""
    cues = []
    if word[:1].isupper():
        cues.append("Capital")
    if any(ch.isdigit() for ch in word):
        cues.append("digit")
    if "-" in word:
        cues.append("hyphen")
    tail = word[-SUFFIX_LENGTH:].lower()
    if len(word) > SUFFIX_LENGTH + 1 and tail.isalpha():
        cues.append(ENDING + tail)
    return OPEN + SEPARATOR.join(cues) + CLOSE if cues else UNKNOWN


def is_class_name(token: str) -> bool:
    """True for UNKNOWN and for every token of the form of a shape class name."""
    return token == UNKNOWN or (len(token) > 2 and token[0] == OPEN and token[-1] == CLOSE)


@dataclass
class WordClasses:
    """How each word reaches the lexicon: as itself when it is frequent in training, else as
    its shape class when that class is frequent among rare words, else as UNKNOWN.

    rare_count: training words seen at most this many times stand for their class.
    signature_min_count: a shape class needs this many rare tokens to be a class of its own.
    """
    known: frozenset[str]
    signatures: frozenset[str]

    @classmethod
    def fit(cls, tokens: Iterable[str], rare_count: int, signature_min_count: int
            ) -> "WordClasses":
        counts = Counter(tokens)
        known = frozenset(w for w, c in counts.items()
                          if c > rare_count and not is_class_name(w))
        shapes: Counter = Counter()
        for w, c in counts.items():
            if w not in known:
                shapes[signature(w)] += c
        shapes.pop(UNKNOWN, None)  # the catch-all is always there, never a shape class
        return cls(known, frozenset(s for s, c in shapes.items() if c >= signature_min_count))

    def __call__(self, word: str) -> str:
        if word in self.known:
            return word
        shape = signature(word)
        return shape if shape in self.signatures else UNKNOWN
