"""Word shape classes, the names that rare and unseen words stand for in a refined grammar.

The classes, their cues and their names are described in `treewright.refine.signatures`, which
learns which classes a treebank keeps (`WordClasses`). They live here, beside the vocabulary,
because a saved grammar that declares them (`@word-shapes 1` in the text format, `word_shapes`
in the JSON export) maps every word outside its vocabulary to its class at parse time
(`Vocabulary.lookup`), exactly as training mapped its rare words.

SCHEME numbers this set of cues and names; a grammar names the scheme it was trained with, so
a later change of the cues would be a new number rather than a silent change of meaning.
"""

from __future__ import annotations

UNKNOWN = "<unk>"   # the class of every word without a cue, or whose shape class is too rare
SUFFIX_LENGTH = 2   # letters of the suffix kept; two already tell much in suffixing languages
OPEN, CLOSE, SEPARATOR, ENDING = "\u27ea", "\u27eb", "\u00b7", "\u2026"
SCHEME = 1          # the cues and names below


def signature(word: str) -> str:
    """The shape class of `word` (see `refine.signatures`), e.g. "⟪Capital·…ar⟫", "⟪digit⟫",
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
