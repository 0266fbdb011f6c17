"""The records every corpus reader shares: options, sentences, skipped records, the summary.

All three input kinds (raw text, bracketed trees, CoNLL-U) read into the same `Sentence` type and
report into the same `ReadReport`, so the layers above never branch on the file format.
"""

from __future__ import annotations

import unicodedata
from dataclasses import dataclass, field
from typing import Iterable, Literal

from treewright.trees import Tree
from treewright.vocab import Vocabulary

Format = Literal["auto", "text", "brackets", "conllu"]
CaseRules = Literal["default", "turkic"]
CASE_RULES = ("default", "turkic")


def lowercase(word: str, rules: str = "default") -> str:
    """`word` in lower case. "default" follows Unicode's language-independent mapping (Python's
    str.lower: I -> i, and dotted capital I, U+0130, -> i + combining dot above); "turkic"
    follows the Turkish and Azerbaijani rules of Unicode's SpecialCasing.txt: I -> dotless
    i (U+0131) and U+0130 -> i."""
    if rules == "turkic":
        word = word.replace("I", "\u0131").replace("\u0130", "i")
    return word.lower()


def normalization_variants(words: Iterable[str]) -> list[list[str]]:
    """The words of `words` that are one word written in two or more Unicode normalization
    forms (a composed letter, or the letter and a combining mark), grouped, each group in the
    order first seen; groups in the order their first word was seen. Readers keep words as
    written, so each form is a word of its own to a grammar or a sampler."""
    forms: dict[str, list[str]] = {}
    for word in dict.fromkeys(words):
        forms.setdefault(unicodedata.normalize("NFC", word), []).append(word)
    return [group for group in forms.values() if len(group) > 1]


def normalization_note(variants: list[list[str]], noun: str) -> str | None:
    """A line for a run's log about `normalization_variants` of its words or characters
    (`noun` in the singular, e.g. "training word"), naming the code points of the first group;
    None when there are none."""
    if not variants:
        return None
    first = variants[0]
    shown = " and ".join(f"{w!r} ({' '.join(f'U+{ord(c):04X}' for c in w)})" for w in first)
    counted = f"1 {noun} is" if len(variants) == 1 else f"{len(variants)} {noun}s are each"
    return (f"{counted} written in two or more Unicode normalization forms, and each form is "
            f"read as one of its own (for example {shown}); to read them as one, write the "
            f"text in one form, for example NFC")


def run_case_rules(data) -> str | None:
    """The case rules by which a training run's `data` config section (as read from its
    config.yaml) lowercased the words, or None when it kept them as written."""
    if not (isinstance(data, dict) and data.get("lowercase")):
        return None
    rules = data.get("case_rules", "default")
    return rules if rules in CASE_RULES else "default"

def run_tag_mode(data) -> bool:
    """True when a training run's `data` config section (as read from its config.yaml) trained
    the grammar on tags (`tag_mode`) rather than on words."""
    return isinstance(data, dict) and bool(data.get("tag_mode"))

# Preterminal labels treated as punctuation in the Penn Treebank tag set (from memory; the usual
# list in unsupervised-parsing evaluation). Pass it as `ReadOptions.punct_labels` to drop them.
PTB_PUNCT_LABELS = frozenset({",", ".", ":", "``", "''", "-LRB-", "-RRB-", "#", "$"})

# The Universal Dependencies tags of function words, the words that attach to the content word
# of their phrase (de Marneffe et al. 2021, "Universal Dependencies", Computational Linguistics
# 47(2); the relations aux, cop, case, mark, det, cc and punct), and the names the older
# universal tagset gives the same classes (Petrov, Das & McDonald 2012, "A Universal
# Part-of-Speech Tagset": CONJ, PRT and "." for conjunctions, particles and punctuation), which
# some treebanks still use. UD_FUNCTION names them in `bias.head_list` and `--function-words`.
UD_FUNCTION = "ud-function"
UD_FUNCTION_TAGS = ("ADP", "AUX", "CCONJ", "DET", "PART", "SCONJ", "PUNCT", "CONJ", "PRT", ".")


@dataclass
class ReadOptions:
    """How to read a corpus. The defaults keep the words as written.

    Call `validate()` (the readers do) to check every value at once.
    """
    # Token normalisation applies to words only; tags are case-significant and never changed.
    lowercase: bool = False
    case_rules: CaseRules = "default"   # how `lowercase` maps capitals (see `lowercase`)
    # Replace every decimal digit by "0" so numbers share statistics (common practice).
    normalize_digits: bool = False
    # Tag mode: the model's tokens are POS tags instead of words. Raw text: the file's tokens are
    # tags. Brackets: the preterminal labels. CoNLL-U: the UPOS column.
    tag_mode: bool = False

    # Sentence length limits, counted in tokens after every removal. Shorter sentences are
    # skipped as "too_short"; longer ones are set aside as "too_long" (kept in Corpus.set_aside).
    min_length: int = 1
    max_length: int | None = None

    # Vocabulary built from the used sentences: words seen at least `min_count` times, at most
    # `max_vocab` types including the unknown token. A given `vocabulary` (e.g. the training
    # corpus's, when reading a test set) is used as is instead.
    min_count: int = 1
    max_vocab: int | None = None
    vocabulary: Vocabulary | None = None

    # Bad records: False stops at the first one with InputError; True skips, counts and lists it.
    skip_bad: bool = False

    # Bracketed trees.
    remove_empty: bool = True             # drop -NONE- elements and nodes left empty by that
    empty_labels: frozenset[str] = frozenset({"-NONE-"})
    strip_function_tags: bool = True      # NP-SBJ-1 -> NP, NP=2 -> NP; -LRB- stays
    punct_labels: frozenset[str] = frozenset()  # preterminal labels to drop (PTB_PUNCT_LABELS)
    # Words to drop wherever they stand (bracketed trees and raw text; CoNLL-U keeps every
    # word, since removing one could disconnect its dependents).
    punct_words: frozenset[str] = frozenset()

    # CoNLL-U. Non-projective sentences are either skipped ("skip") or made projective by
    # lifting arcs ("lift"); the count is reported either way.
    nonprojective: Literal["skip", "lift"] = "skip"
    # Phrase labels: "upos" labels each word's subtree by the head's UPOS; "fixed" uses
    # `fixed_label` for every phrase. Preterminals always carry the word's UPOS.
    dependency_labels: Literal["upos", "fixed"] = "upos"
    fixed_label: str = "X"

    def validate(self) -> None:
        """Raise ValueError listing every impossible value at once."""
        problems = []
        if self.min_length < 0:
            problems.append(f"min_length must be >= 0, got {self.min_length}")
        if self.max_length is not None and self.max_length < max(self.min_length, 1):
            problems.append(f"max_length must be >= max(min_length, 1), got {self.max_length}")
        if self.min_count < 1:
            problems.append(f"min_count must be >= 1, got {self.min_count}")
        if self.max_vocab is not None and self.max_vocab < 1:
            problems.append(f"max_vocab must be >= 1, got {self.max_vocab}")
        if self.case_rules not in CASE_RULES:
            problems.append(f"case_rules must be one of {CASE_RULES}, got {self.case_rules!r}")
        if self.nonprojective not in ("skip", "lift"):
            problems.append(f"nonprojective must be 'skip' or 'lift', got {self.nonprojective!r}")
        if self.dependency_labels not in ("upos", "fixed"):
            problems.append("dependency_labels must be 'upos' or 'fixed', "
                            f"got {self.dependency_labels!r}")
        if problems:
            raise ValueError("; ".join(problems))


def run_drop_tags(data) -> frozenset[str]:
    """The tags whose words a training run's `data` config section removed (`drop_tags`)."""
    value = data.get("drop_tags") if isinstance(data, dict) else None
    return frozenset(t.strip() for t in value.split(",") if t.strip()) \
        if isinstance(value, str) else frozenset()


def run_read_options(data, **extra) -> ReadOptions:
    """ReadOptions that read a corpus as a training run's `data` config section (as read from
    its config.yaml; None: a grammar without a run) read its training corpus: its lowercasing
    (of words only: tags are never changed), tag mode and dropped tags. `extra` sets the other
    fields."""
    rules = run_case_rules(data)
    return ReadOptions(lowercase=rules is not None, case_rules=rules or "default",
                       tag_mode=run_tag_mode(data), punct_labels=run_drop_tags(data), **extra)


@dataclass
class Sentence:
    """One usable sentence.

    `words` are the surface words as read (after removals); `tokens` are what a model sees:
    normalised words, or the tags in tag mode (not yet mapped to the unknown token; use
    `Corpus.encode`). `tree` leaves are `words`, in order, when there is a tree. `line` is the
    1-based line where the sentence starts in `source`; `sent_id` is the name the source gives
    it (CoNLL-U `# sent_id`), None where the format has none. `joined` marks, per word, the
    words written joined to the word before them in one orthographic word (CoNLL-U multiword
    tokens and `SpaceAfter=No`; see `treewright.word_pieces`); None where the format does not
    say. `contracted` gives, per word, the written form of the CoNLL-U multiword token it lies
    in when the token's words run together do not spell it (`au` over `à` and `le`), else None;
    None when the sentence has no such token. `in_token` marks, per word, the words that lie in
    one CoNLL-U multiword token with the word before them (so that a word removed between them
    does not part them: `corpus.joined_without`); None where the format has no such tokens.
    """
    words: list[str]
    tokens: list[str]
    tree: Tree | None = None
    tags: list[str] | None = None
    source: str = ""
    line: int = 0
    heads: list[int] | None = None
    sent_id: str | None = None
    joined: list[bool] | None = None
    contracted: list[str | None] | None = None
    in_token: list[bool] | None = None

    def __len__(self) -> int:
        return len(self.tokens)


@dataclass
class SkippedRecord:
    """An input sentence that was not used, and why. `reason` is one of REASONS."""
    reason: str
    source: str
    line: int
    column: int | None = None
    message: str = ""

    def format(self) -> str:
        where = f"{self.source}, line {self.line}"
        if self.column is not None:
            where += f", column {self.column}"
        return f"{where}: {self.reason}: {self.message}" if self.message else \
            f"{where}: {self.reason}"


# Why a sentence can go unused. Every input sentence is used or counted under one of these.
REASONS = (
    "malformed",      # a record the reader could not parse (only with skip_bad=True)
    "empty",          # no tokens at all (a blank line, or everything removed)
    "too_short",      # fewer tokens than min_length
    "too_long",       # more tokens than max_length (set aside, kept in Corpus.set_aside)
    "nonprojective",  # CoNLL-U, with nonprojective="skip"
    "no_tags",        # tag mode, but the tree has words outside preterminals
)


@dataclass
class ReadReport:
    """What reading a corpus did: `sentences_read == sentences_used + sum(skipped_by_reason)`.

    `tokens` counts the used sentences' tokens; `unk_rate` is the fraction of them that the
    vocabulary maps to the unknown token (None before a vocabulary exists). `nonprojective` is the
    number of non-projective CoNLL-U sentences seen and `projectivised` how many were lifted.
    """
    sources: list[str] = field(default_factory=list)
    fmt: str = ""
    sentences_read: int = 0
    sentences_used: int = 0
    skipped_by_reason: dict[str, int] = field(default_factory=dict)
    tokens: int = 0
    vocab_size: int | None = None
    unk_rate: float | None = None
    nonprojective: int = 0
    projectivised: int = 0
    skipped: list[SkippedRecord] = field(default_factory=list)

    @property
    def sentences_skipped(self) -> int:
        return sum(self.skipped_by_reason.values())

    def add_skip(self, record: SkippedRecord) -> None:
        self.skipped.append(record)
        self.skipped_by_reason[record.reason] = self.skipped_by_reason.get(record.reason, 0) + 1

    def format(self) -> str:
        """Readable lines, one fact each."""
        lines = [f"read {self.sentences_read} sentences ({self.fmt}) from "
                 + ", ".join(self.sources),
                 f"used {self.sentences_used} sentences, {self.tokens} tokens"]
        if self.skipped_by_reason:
            lines.append(f"skipped {self.sentences_skipped}: " + ", ".join(
                f"{reason} {count}" for reason, count in sorted(self.skipped_by_reason.items())))
        if self.nonprojective:
            lines.append(f"non-projective {self.nonprojective}, "
                         f"projectivised {self.projectivised}")
        if self.vocab_size is not None:
            lines.append(f"vocabulary {self.vocab_size} types")
        if self.unk_rate is not None:
            lines.append(f"unknown-token rate {100 * self.unk_rate:.2f}%")
        return "\n".join(lines)

    def to_dict(self) -> dict:
        """Plain values only (JSON-ready); the skipped records as formatted strings."""
        return {
            "sources": list(self.sources), "fmt": self.fmt,
            "sentences_read": self.sentences_read, "sentences_used": self.sentences_used,
            "skipped_by_reason": dict(self.skipped_by_reason), "tokens": self.tokens,
            "vocab_size": self.vocab_size, "unk_rate": self.unk_rate,
            "nonprojective": self.nonprojective, "projectivised": self.projectivised,
            "skipped": [r.format() for r in self.skipped],
        }


@dataclass
class Corpus:
    """Sentences read from one file, the vocabulary over their tokens, and the read report."""
    sentences: list[Sentence]
    vocabulary: Vocabulary
    report: ReadReport
    set_aside: list[Sentence] = field(default_factory=list)  # the too-long sentences

    def __len__(self) -> int:
        return len(self.sentences)

    def encode(self, sentence: Sentence) -> list[int]:
        """Token ids of `sentence` under this corpus's vocabulary, unknown tokens to UNK."""
        return self.vocabulary.encode(sentence.tokens)

    def lengths(self) -> list[int]:
        return [len(s) for s in self.sentences]
