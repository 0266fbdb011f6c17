"""Word signatures: rare and unknown words fall into classes by their shape, so a refined grammar
parses new text (the unknown-word classes of Petrov et al. 2006 are built from the same cues:
capitalisation, digits, hyphens and the suffix; the exact classes here are ours).
"""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass
from typing import Iterable

UNKNOWN = "<unk>"   # the class of every word whose signature is itself too rare
SUFFIX_LENGTH = 2   # letters of the suffix kept; two already tell much in suffixing languages


def signature(word: str) -> str:
    """The shape class of `word`, e.g. "<unk-cap-s:ar>", "<unk-num>", "<unk-dash-s:ed>"."""
    parts = ["<unk"]
    if word[:1].isupper():
        parts.append("-cap")
    if any(ch.isdigit() for ch in word):
        parts.append("-num")
    if "-" in word:
        parts.append("-dash")
    tail = word[-SUFFIX_LENGTH:].lower()
    if len(word) > SUFFIX_LENGTH + 1 and tail.isalpha():
        parts.append("-s:" + tail)
    return "".join(parts) + ">"


@dataclass
class WordClasses:
    """How each word reaches the lexicon: as itself when it is frequent in training, else as
    its signature when that signature is frequent among rare words, else as UNKNOWN.

    rare_count: training words seen at most this many times stand for their class.
    signature_min_count: a signature needs this many rare tokens to be a class of its own.
    """
    known: frozenset[str]
    signatures: frozenset[str]

    @classmethod
    def fit(cls, tokens: Iterable[str], rare_count: int, signature_min_count: int
            ) -> "WordClasses":
        counts = Counter(tokens)
        known = frozenset(w for w, c in counts.items() if c > rare_count)
        shapes: Counter = Counter()
        for w, c in counts.items():
            if w not in known:
                shapes[signature(w)] += c
        return cls(known, frozenset(s for s, c in shapes.items() if c >= signature_min_count))

    def __call__(self, word: str) -> str:
        if word in self.known:
            return word
        shape = signature(word)
        return shape if shape in self.signatures else UNKNOWN
