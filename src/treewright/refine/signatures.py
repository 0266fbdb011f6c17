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
from typing import ClassVar, Iterable

# The shape classes themselves live with the vocabulary (`treewright.wordshapes`), because a
# saved grammar maps unseen words to them at parse time, below the refinement layer.
from treewright.wordshapes import (CLOSE, ENDING, OPEN, SCHEME, SEPARATOR, SUFFIX_LENGTH,
                                   UNKNOWN, is_class_name, signature)

__all__ = ["CLOSE", "ENDING", "OPEN", "SCHEME", "SEPARATOR", "SUFFIX_LENGTH", "UNKNOWN", "WordClasses",
           "is_class_name", "signature"]


@dataclass
class WordClasses:
    """How each word reaches the lexicon: as itself when it is frequent in training, else as
    its shape class when that class is frequent among rare words, else as UNKNOWN.

    rare_count: training words seen at most this many times stand for their class.
    signature_min_count: a shape class needs this many rare tokens to be a class of its own.
    """
    known: frozenset[str]
    signatures: frozenset[str]
    # The shape scheme a grammar trained on these words declares (`Vocabulary.shapes`): with
    # it, the grammar reads an unseen word as `__call__` would (its kept words and classes are
    # exactly the grammar's words).
    scheme: ClassVar[int] = SCHEME

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
