"""Written words that a tokenizer split into pieces, as a constraint on constituents.

A tokenizer may split one written word into several tokens. CoNLL-U keeps what was written:
a multiword-token line (`3-4 del` over `de` and `el`), or `SpaceAfter=No` between the pieces
(the Turkish web treebank writes `kullanmaya` as `kullan` + `maya`). The reader gives this per
word as `Sentence.joined`. It is structure that raw text gives for free.

Taking the whole written word as a bracket that no constituent may cross (Pereira & Schabes
1992, "Inside-outside reestimation from partially bracketed corpora") is wrong where a bound
piece takes a whole phrase: Turkish `maya` takes `penaltıyı kullan`, so the bracket
[kullan maya] crosses the gold constituent [penaltıyı kullan]. On the Turkish web treebank
(PyPI turkish-treebanks) 42% of the split written words cross a gold span that way. What holds
there for 99.2% of them (`tests/test_word_pieces.py`): no constituent takes a bound piece
without its host. Every constituent that contains a bound piece also contains the host.

Which end of a written word holds the host is read from the text, not assumed. Bound pieces
(suffixes, clitics) seldom stand alone as written words, while hosts often do, so the host is
the end whose pieces more often occur elsewhere as whole written words. On Turkish web, 59% of
first pieces but 20% of last pieces do, so the host comes first. `host_side` says so only when
one end's share is at least `MIN_RATIO` times the other's (a guard against noise; 1.25 was
chosen by reasoning, not by tuning). A text that puts no space between most of its words (the
scripts that write none) tells nothing this way, and the constraint is left off.
"""

from __future__ import annotations

import unicodedata
from dataclasses import dataclass
from typing import Sequence

import torch
from torch import Tensor

HOST_SIDES = ("first", "last")
MIN_SPLIT_WORDS = 20    # fewer split written words than this say nothing about the host side
MIN_RATIO = 1.25        # one end's free share must be this many times the other's
MAX_JOINED_SHARE = 0.5  # above this share of word boundaries without a space, spaces mean nothing
# How long `constraints.word_pieces_epochs: null` keeps the constraint when training reads tags.
TAG_MODE_PIECE_EPOCHS = 3


@dataclass(frozen=True)
class HostSide:
    """What `host_side` found. side: "first", "last" or None (no constraint), with the reason."""
    side: str | None
    split_words: int            # written words of two or more pieces
    first_free: float           # share of their first pieces that occur alone elsewhere
    last_free: float            # share of their last pieces that do
    joined_share: float         # share of word boundaries written without a space
    reason: str

    def describe(self) -> str:
        return (f"word pieces: {self.split_words} written words split into pieces; "
                f"{self.first_free:.0%} of first and {self.last_free:.0%} of last pieces occur "
                f"alone elsewhere; {self.reason}")


def split_words(joined: Sequence[bool]) -> list[tuple[int, int]]:
    """The written words of two or more pieces, as spans (start, end) of word indices."""
    out, start = [], 0
    for k in range(1, len(joined) + 1):
        if k == len(joined) or not joined[k]:
            if k - start >= 2:
                out.append((start, k))
            start = k
    return out


def written_forms(words: Sequence[str], joined: Sequence[bool] | None,
                  contracted: Sequence[str | None] | None = None) -> list[tuple[int, int, str]]:
    """Each written word of a sentence as (start, end, form) over word indices: its words run
    together, except that the words of a contracted multiword token (`Sentence.contracted`,
    which its words do not spell) give that token's written form once. Without `joined`,
    every word is written alone."""
    groups = dict(split_words(joined)) if joined is not None else {}
    marks = contracted if contracted is not None else [None] * len(words)
    out, k = [], 0
    while k < len(words):
        end = groups.get(k, k + 1)
        pieces = [marks[i] if marks[i] is not None else words[i] for i in range(k, end)
                  if marks[i] is None or i == k or marks[i] != marks[i - 1]]
        out.append((k, end, "".join(pieces)))
        k = end
    return out


PUNCTUATION_TAGS = frozenset({"PUNCT", "."})  # Universal Dependencies' and the older universal
                                             # tagset's tag for punctuation


def is_punctuation(word: str, tag: str | None = None) -> bool:
    """Punctuation by its tag where the source gives one (`PUNCTUATION_TAGS`), else a word
    written with punctuation characters alone (Unicode categories P*)."""
    if tag is not None and tag != "_":
        return tag in PUNCTUATION_TAGS
    return bool(word) and all(unicodedata.category(c).startswith("P") for c in word)


def piece_joins(words: Sequence[str], joined: Sequence[bool] | None,
                tags: Sequence[str] | None = None) -> list[bool] | None:
    """`joined` without the joins of punctuation at either edge of a written word: a comma, a
    full stop or a quote written against a word (CoNLL-U `SpaceAfter=No` before it, or after
    an opening one) is no piece of that word, so the constraint neither counts it nor keeps
    it with the word. Punctuation inside a written word, with pieces on both sides (an
    apostrophe before a suffix, a quote inside a multiword token), stays joined. `tags`, when
    the source gives them, decide what is punctuation (`is_punctuation`)."""
    if joined is None:
        return None
    out = list(joined)

    def punct(k: int) -> bool:
        return is_punctuation(words[k], None if tags is None else tags[k])

    for start, end in split_words(joined):
        lo, hi = start, end
        while lo < hi and punct(lo):
            lo += 1
        while hi > lo and punct(hi - 1):
            hi -= 1
        for k in range(start + 1, end):
            if k <= lo or k >= hi:      # the join of word k to k - 1 touches edge punctuation
                out[k] = False
    return out


def host_side(sentences: Sequence[tuple[Sequence[str], Sequence[bool] | None]]) -> HostSide:
    """The end of a split written word that holds its host, read from the corpus.

    sentences: (tokens, joined) per sentence; joined None where the source does not say (give
    `piece_joins` of a sentence's joins, so that punctuation written against a word is no
    piece of it).
    """
    alone: set[str] = set()
    firsts: list[str] = []
    lasts: list[str] = []
    boundaries = joins = 0
    for tokens, joined in sentences:
        if joined is None:
            continue
        boundaries += max(len(tokens) - 1, 0)
        joins += sum(joined[1:])
        groups = split_words(joined)
        inside = set()
        for start, end in groups:
            firsts.append(tokens[start])
            lasts.append(tokens[end - 1])
            inside.update(range(start, end))
        alone.update(t for k, t in enumerate(tokens) if k not in inside)
    n = len(firsts)
    first_free = sum(t in alone for t in firsts) / n if n else 0.0
    last_free = sum(t in alone for t in lasts) / n if n else 0.0
    share = joins / boundaries if boundaries else 0.0

    def found(side, reason):
        return HostSide(side, n, first_free, last_free, share, reason)

    if n < MIN_SPLIT_WORDS:
        return found(None, f"fewer than {MIN_SPLIT_WORDS} split words, no constraint")
    if share > MAX_JOINED_SHARE:
        return found(None, f"{share:.0%} of word boundaries have no space, so spaces do not "
                           "mark words here; no constraint")
    if first_free >= MIN_RATIO * last_free and first_free > 0:
        return found("first", "the host comes first: no constituent starts at a later piece")
    if last_free >= MIN_RATIO * first_free and last_free > 0:
        return found("last", "the host comes last: no constituent ends at an earlier piece")
    return found(None, "neither end stands alone clearly more often; no constraint")


def barred_positions(joined: Sequence[bool] | None) -> list[int]:
    """Word positions k written joined to word k - 1 (give it `piece_joins` of the sentence's
    joins, as training does). With the host first, no constituent of two or more words may
    start at k; with the host last, none may end just before k (its exclusive end is k). Either
    way the piece is not cut from its host."""
    return [] if joined is None else [k for k, j in enumerate(joined) if j and k > 0]


def sentence_barred(sentence) -> list[int]:
    """`barred_positions` of a read sentence's `piece_joins` (its words, joins and tags: a
    `corpus.Sentence`), as training makes them."""
    return barred_positions(piece_joins(sentence.words, sentence.joined, sentence.tags))


def cuts_piece(side: str, barred: Sequence[int] | set[int], start: int, end: int) -> bool:
    """Whether the span [start, end) is one the constraint forbids: two or more words that
    start at a barred position (side "first") or end just before one (side "last")."""
    return end - start >= 2 and (start if side == "first" else end) in barred


def piece_mask(side: str, barred: Sequence[Sequence[int]], n: int, dtype: torch.dtype) -> Tensor:
    """(B, n+1, n+1) [start, width] log-potentials: -inf on every span of width >= 2 that starts
    at a barred position (side "first": the host is the first piece of a written word) or ends
    just before one (side "last"), 0 elsewhere: the constraint as training and decoding apply
    it. `barred`: per sentence, `barred_positions` of its joins."""
    pot = torch.zeros(len(barred), n + 1, n + 1, dtype=dtype)
    widths = torch.arange(n + 1)
    for b, positions in enumerate(barred):
        for k in positions:
            if side == "first":
                pot[b, k, 2:] = float("-inf")
            else:
                w = widths[2:k + 1]                          # spans (k - w, k) of width >= 2
                pot[b, k - w, w] = float("-inf")
    return pot


def held_at_end(training: dict | None) -> str | None:
    """The host side ("first" or "last") of the word-piece constraint that a training run
    still applied at its last epoch, or None: the run found no side, turned the constraint off,
    released it before its configured last epoch (`constraints.word_pieces_epochs`, which on
    tags defaults to `TAG_MODE_PIECE_EPOCHS`), or left no record of it. A run that stopped early
    by its tolerance counts as released when its configured epochs pass that limit.

    training: a run's record as `export.GrammarSource.training` gives it ("config": its
    config.yaml as data, "data_summary": its data_summary.json, whose `word_pieces_host` says
    the side), or None for a bare grammar file."""
    if not isinstance(training, dict):
        return None
    summary, config = training.get("data_summary"), training.get("config")
    if not isinstance(summary, dict) or not isinstance(config, dict):
        return None
    side = summary.get("word_pieces_host")
    if side not in HOST_SIDES:
        return None

    def section(name):
        value = config.get(name)
        return value if isinstance(value, dict) else {}

    limit = section("constraints").get("word_pieces_epochs")
    if limit is None and section("data").get("tag_mode"):
        limit = TAG_MODE_PIECE_EPOCHS
    if limit is None:
        return side
    epochs = section("train").get("epochs")
    return side if isinstance(epochs, int) and epochs <= limit else None
