"""Word inventory: a list of word types, their ids, and the reserved unknown-word token."""

from __future__ import annotations

from collections import Counter
from typing import Iterable, Sequence

from treewright.wordshapes import SCHEME, is_class_name, signature

UNK = "<unk>"


class Vocabulary:
    """An ordered list of word types; `UNK` (when present) stands for every word not in it.

    With `shapes` (a `wordshapes.SCHEME` number; None: no shape classes), a word not in the
    list stands for its shape class when the class is in the list, and for `unk` only
    otherwise: the mapping a refined grammar was trained with (`refine.signatures.WordClasses`,
    whose kept words and kept classes are exactly the grammar's words). A word that has the form
    of a class name is never itself: it too stands for its class, as in training.

    >>> v = Vocabulary(["ferry", "salt", UNK])
    >>> v.encode(["salt", "barge"])
    [1, 2]
    """

    def __init__(self, words: Sequence[str], unk: str | None = UNK, shapes: int | None = None):
        if shapes is not None and shapes != SCHEME:
            raise ValueError(f"word shape scheme {shapes} is not supported (this treewright "
                             f"has scheme {SCHEME})")
        self.shapes = shapes
        self.words = list(words)
        self.index = {w: i for i, w in enumerate(self.words)}
        if len(self.index) != len(self.words):
            raise ValueError("vocabulary has repeated words")
        self.unk = unk if unk is not None and unk in self.index else None

    def __len__(self) -> int:
        return len(self.words)

    def __contains__(self, word: str) -> bool:
        return word in self.index

    @property
    def unk_id(self) -> int | None:
        return None if self.unk is None else self.index[self.unk]

    def encode(self, words: Iterable[str]) -> list[int]:
        """Ids of `words`; unknown words map to the unknown token, or to -1 when there is none
        (the engine reports such a sentence as unparseable instead of guessing)."""
        return [self.lookup(w) for w in words]

    def lookup(self, word: str) -> int:
        """The id `word` is read as: its own, else its shape class's (with `shapes`), else the
        unknown token's, else -1."""
        if self.shapes is None or not is_class_name(word):
            found = self.index.get(word)
            if found is not None:
                return found
        if self.shapes is not None:
            found = self.index.get(signature(word))
            if found is not None:
                return found
        return -1 if self.unk is None else self.index[self.unk]

    @classmethod
    def from_counts(cls, counts: Counter, min_count: int = 1, max_size: int | None = None,
                    unk: str = UNK) -> "Vocabulary":
        """Keep words seen at least `min_count` times, the most frequent `max_size` of them
        (ties broken alphabetically so the result is deterministic); add `unk` last."""
        kept = sorted((w for w, c in counts.items() if c >= min_count and w != unk),
                      key=lambda w: (-counts[w], w))
        if max_size is not None:
            kept = kept[: max(0, max_size - 1)]
        return cls(kept + [unk], unk=unk)
