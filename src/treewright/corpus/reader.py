"""One interface for every corpus kind: `read_corpus` for a file that fits in memory,
`CorpusStream` for one that does not.

    corpus = read_corpus("train.conllu", options=ReadOptions(max_length=40))
    print(corpus.report.format())

    stream = CorpusStream("huge.txt", fmt="text")
    for chunk in stream.chunks(10_000):   # never more than one chunk in memory
        ...
"""

from __future__ import annotations

import os
import re
from collections import Counter
from dataclasses import replace
from typing import Iterator

from treewright.errors import InputError
from treewright.trees import Tree
from treewright.vocab import Vocabulary
from treewright.corpus.brackets import clean_tree, iter_bracket_records, preterminal_tags
from treewright.corpus.dependencies import (dependency_to_tree, iter_conllu_blocks,
                                            lift_to_projective, nonprojective_arcs)
from treewright.corpus.lines import check_readable, iter_lines
from treewright.corpus.types import (Corpus, ReadOptions, ReadReport, Sentence, SkippedRecord,
                                     lowercase)

FORMATS = ("text", "brackets", "conllu")
_CONLLU_EXTENSIONS = (".conllu", ".conll")
_DIGIT = re.compile(r"\d")


def _is_unknown(token: str, vocabulary: Vocabulary) -> bool:
    """True if `token` is encoded as the unknown token (a literal UNK in the data included)."""
    index = vocabulary.index.get(token)
    return index is None or index == vocabulary.unk_id


# The first line of a CoNLL-U sentence (the format's definition): ten tab-separated columns, the
# ID its first word (1), a multiword token from it (1-2) or an empty node before it (0.1), HEAD
# (the seventh) a number or _.
_CONLLU_COLUMNS = 10
_FIRST_ID = re.compile(r"1|1-[0-9]+|0\.[0-9]+")
_HEAD = re.compile(r"[0-9]+|_")


def starts_conllu_sentence(text: str) -> bool:
    """True if `text` can be the first line of a CoNLL-U sentence: ten tab-separated columns,
    the first a sentence's first id (`1`, `1-2`, `0.1`), HEAD a number or `_`. A raw-text line
    of ten tab-separated tokens seldom has all three."""
    fields = text.split("\t")
    return (len(fields) == _CONLLU_COLUMNS and _FIRST_ID.fullmatch(fields[0]) is not None
            and _HEAD.fullmatch(fields[6]) is not None)


def detect_format(path: str | os.PathLike) -> str:
    """The format of a corpus file, by name and then by content: 'conllu' for a .conllu/.conll
    file, or one whose first line that is neither blank nor a `#` comment can start a CoNLL-U
    sentence (`starts_conllu_sentence`); 'brackets' if the first non-space character is '(';
    else 'text'. Raises InputError for a missing, empty or non-UTF-8 file."""
    name = check_readable(path)
    if name.lower().endswith(_CONLLU_EXTENSIONS):
        return "conllu"
    comments = False
    for _, text in iter_lines(name):
        stripped = text.lstrip()
        if not stripped:
            continue
        if text.startswith("#"):  # a CoNLL-U comment, or raw text that starts with '#'
            comments = True
            continue
        if starts_conllu_sentence(text):
            return "conllu"
        return "brackets" if stripped.startswith("(") and not comments else "text"
    return "text"


class CorpusStream:
    """Sentences of one file, read lazily: iterate for `Sentence`s, or use `chunks(size)`.

    Each pass starts a fresh `report`, complete once the pass ends. Too-long sentences are kept
    in `set_aside` (and counted) unless `keep_set_aside` is false, as for corpora streamed
    because they are larger than memory; everything else unused is counted and listed in the
    report. `fmt` is "auto" (see `detect_format`), "text", "brackets" or "conllu".
    """

    def __init__(self, path: str | os.PathLike, fmt: str = "auto",
                 options: ReadOptions | None = None, keep_set_aside: bool = True):
        self.keep_set_aside = keep_set_aside
        self.options = options if options is not None else ReadOptions()
        self.options.validate()
        self.path = check_readable(path)
        if fmt == "auto":
            fmt = detect_format(self.path)
        if fmt not in FORMATS:
            raise ValueError(f"fmt must be 'auto' or one of {FORMATS}, got {fmt!r}")
        self.fmt = fmt
        self.report = ReadReport(sources=[self.path], fmt=fmt)
        self.set_aside: list[Sentence] = []

    def __iter__(self) -> Iterator[Sentence]:
        self.report = ReadReport(sources=[self.path], fmt=self.fmt)
        self.set_aside = []
        vocabulary = self.options.vocabulary
        unknown = 0
        records = {"text": self._text, "brackets": self._brackets, "conllu": self._conllu}
        for sentence in records[self.fmt]():
            if sentence is None:
                continue
            self.report.sentences_used += 1
            self.report.tokens += len(sentence.tokens)
            if vocabulary is not None:
                unknown += sum(_is_unknown(t, vocabulary) for t in sentence.tokens)
            yield sentence
        if vocabulary is not None:
            self.report.vocab_size = len(vocabulary)
            self.report.unk_rate = unknown / self.report.tokens if self.report.tokens else 0.0

    def chunks(self, size: int) -> Iterator[list[Sentence]]:
        """The used sentences in lists of at most `size`, in file order."""
        if size < 1:
            raise ValueError(f"chunk size must be >= 1, got {size}")
        chunk: list[Sentence] = []
        for sentence in self:
            chunk.append(sentence)
            if len(chunk) == size:
                yield chunk
                chunk = []
        if chunk:
            yield chunk

    def count_tokens(self) -> Counter:
        """Token counts over the used sentences (one pass), for `Vocabulary.from_counts`."""
        counts: Counter = Counter()
        for sentence in self:
            counts.update(sentence.tokens)
        return counts

    # -- one generator per format; each yields a Sentence or None (counted as skipped) --

    def _skip(self, reason: str, line: int, column: int | None = None,
              message: str = "") -> None:
        self.report.add_skip(SkippedRecord(reason, self.path, line, column, message))

    def _bad(self, error: InputError) -> None:
        if not self.options.skip_bad:
            raise error
        self._skip("malformed", error.line or 0, error.column, error.reason)

    def _normalise(self, word: str) -> str:
        if self.options.lowercase:
            word = lowercase(word, self.options.case_rules)
        if self.options.normalize_digits:
            word = _DIGIT.sub("0", word)
        return word

    def _finish(self, words: list[str], tags: list[str] | None, tree: Tree | None, line: int,
                heads: list[int] | None = None, sent_id: str | None = None,
                joined: list[bool] | None = None,
                contracted: list[str | None] | None = None,
                in_token: list[bool] | None = None) -> Sentence | None:
        """Apply tag mode and the length limits; count the sentence if it goes unused."""
        if self.options.tag_mode:
            if tags is None:
                self._skip("no_tags", line, message="some word has no preterminal tag")
                return None
            tokens = list(tags)
        else:
            tokens = [self._normalise(w) for w in words]
        sentence = Sentence(words=words, tokens=tokens, tree=tree, tags=tags, source=self.path,
                            line=line, heads=heads, sent_id=sent_id, joined=joined,
                            contracted=contracted, in_token=in_token)
        n = len(tokens)
        if n == 0:
            self._skip("empty", line)
            return None
        if n < self.options.min_length:
            self._skip("too_short", line, message=f"{n} tokens < min_length "
                       f"{self.options.min_length}")
            return None
        if self.options.max_length is not None and n > self.options.max_length:
            self._skip("too_long", line, message=f"{n} tokens > max_length "
                       f"{self.options.max_length}")
            if self.keep_set_aside:
                self.set_aside.append(sentence)
            return None
        return sentence

    def _text(self) -> Iterator[Sentence | None]:
        punct = self.options.punct_words
        for number, text in iter_lines(self.path):
            self.report.sentences_read += 1
            words = [w for w in text.split() if w not in punct]
            tags = list(words) if self.options.tag_mode else None
            yield self._finish(words, tags, None, number)

    def _brackets(self) -> Iterator[Sentence | None]:
        for record in iter_bracket_records(iter_lines(self.path), self.path):
            self.report.sentences_read += 1
            if record.error is not None:
                self._bad(record.error)
                yield None
                continue
            tree = clean_tree(record.tree, self.options)
            if tree is None:
                self._skip("empty", record.line, record.column, "nothing left after removals")
                yield None
                continue
            yield self._finish(tree.leaves(), preterminal_tags(tree), tree, record.line)

    def _conllu(self) -> Iterator[Sentence | None]:
        options = self.options
        for block in iter_conllu_blocks(iter_lines(self.path), self.path):
            self.report.sentences_read += 1
            if isinstance(block, InputError):
                self._bad(block)
                yield None
                continue
            joined, contracted = block.joined, block.contracted
            if block.heads is None:
                # Only tokenized: words (and joins) without a tree.
                keep = [t not in options.punct_labels for t in block.upos]
                yield self._finish([w for w, k in zip(block.words, keep) if k],
                                   [t for t, k in zip(block.upos, keep) if k], None,
                                   block.line, sent_id=block.sent_id,
                                   joined=joined_without(joined, keep, block.in_token),
                                   contracted=_kept(contracted, keep),
                                   in_token=in_token_without(block.in_token, keep))
                continue
            heads = block.heads
            if nonprojective_arcs(heads):
                self.report.nonprojective += 1
                if options.nonprojective == "skip":
                    self._skip("nonprojective", block.line)
                    yield None
                    continue
                heads = lift_to_projective(heads)
                self.report.projectivised += 1
            tree = dependency_to_tree(block.words, block.upos, heads, options.dependency_labels,
                                      options.fixed_label)
            words, upos, kept_heads = block.words, block.upos, block.heads
            in_token = block.in_token
            if options.punct_labels and any(t in options.punct_labels for t in upos):
                # Removed from the constituency tree, as for bracketed trees; the dependency
                # heads survive only when no removed word has a dependent.
                tree = clean_tree(tree, options)
                if tree is None:
                    self._skip("empty", block.line, message="nothing left after removals")
                    yield None
                    continue
                keep = [t not in options.punct_labels for t in upos]
                kept_heads = _heads_without(block.heads, [not k for k in keep])
                words, upos = tree.leaves(), preterminal_tags(tree)
                aligned = sum(keep) == len(words)
                joined = joined_without(joined, keep, block.in_token) if aligned else None
                contracted = _kept(contracted, keep) if aligned else None
                in_token = in_token_without(in_token, keep) if aligned else None
            yield self._finish(words, upos, tree, block.line, heads=kept_heads,
                               sent_id=block.sent_id, joined=joined, contracted=contracted,
                               in_token=in_token)


def _kept(values: list | None, keep: list[bool]) -> list | None:
    """The entries of the kept words (None stays None)."""
    return None if values is None else [v for v, k in zip(values, keep) if k]


def joined_without(joined: list[bool] | None, keep: list[bool],
                    in_token: list[bool] | None = None) -> list[bool] | None:
    """`joined` (per word, written joined to the word before) for the kept words only: a word
    stays joined only when the word before it was kept too, since a removed word between them
    (punctuation, say) is not part of the orthographic word the constraint is about, unless
    every word from the kept one before it lies in one multiword token with it (`in_token`):
    a quote removed from `ב"פולחן` (ב + " + פולחן) leaves ב written joined to פולחן."""
    if joined is None:
        return None
    out: list[bool] = []
    before = -1  # the last kept word
    for i, (j, k) in enumerate(zip(joined, keep)):
        if not k:
            continue
        one_token = in_token is not None and before >= 0 and all(in_token[before + 1:i + 1])
        out.append(j and before >= 0 and (before == i - 1 or one_token))
        before = i
    return out


def in_token_without(in_token: list[bool] | None, keep: list[bool]) -> list[bool] | None:
    """`in_token` (per word, in one multiword token with the word before) for the kept words
    only: a kept word is in one token with the kept word before it when every word from that
    one to it lies in one multiword token (None stays None)."""
    if in_token is None:
        return None
    out: list[bool] = []
    before = -1
    for i, k in enumerate(keep):
        if k:
            out.append(before >= 0 and all(in_token[before + 1:i + 1]))
            before = i
    return out


def _heads_without(heads: list[int], drop: list[bool]) -> list[int] | None:
    """1-based heads (0 = root) after removing the words marked in `drop`, renumbered; None
    when a removed word heads a kept one (the arcs would have to be invented)."""
    new_id, count = {0: 0}, 0
    for i, gone in enumerate(drop, start=1):
        if not gone:
            count += 1
            new_id[i] = count
    kept = []
    for i, (h, gone) in enumerate(zip(heads, drop), start=1):
        if gone:
            continue
        if h not in new_id:
            return None
        kept.append(new_id[h])
    return kept


def read_corpus(path: str | os.PathLike, fmt: str = "auto",
                options: ReadOptions | None = None) -> Corpus:
    """Read a whole corpus file into memory, with its vocabulary and report.

    fmt: "auto" (default; see `detect_format`), "text", "brackets" or "conllu".
    The vocabulary is `options.vocabulary` if given, else built from the used sentences'
    tokens with `min_count` and `max_vocab`. Raises InputError for a missing, empty or
    non-UTF-8 file, a malformed record (unless `skip_bad`), or a file with no usable sentence.
    """
    stream = CorpusStream(path, fmt, options)
    sentences = list(stream)
    report = stream.report
    if not sentences:
        raise InputError(no_usable_sentence(report), path=stream.path)
    vocabulary = stream.options.vocabulary
    if vocabulary is None:
        counts: Counter = Counter()
        for sentence in sentences:
            counts.update(sentence.tokens)
        vocabulary = Vocabulary.from_counts(counts, min_count=stream.options.min_count,
                                            max_size=stream.options.max_vocab)
        unknown = sum(c for w, c in counts.items() if _is_unknown(w, vocabulary))
        report.vocab_size = len(vocabulary)
        report.unk_rate = unknown / report.tokens
    return Corpus(sentences=sentences, vocabulary=vocabulary, report=report,
                  set_aside=stream.set_aside)


def read_records(path: str | os.PathLike, fmt: str = "auto",
                 options: ReadOptions | None = None) -> list[Sentence]:
    """One sentence per record of a file, for parsing or scoring it: each tree of a bracketed
    file, each sentence block of CoNLL-U, each non-blank line of raw text (a blank line holds
    no sentence; the commands that keep one output line per input line read raw text
    themselves).

    Bracketed and CoNLL-U files are read as evaluation reads gold (empty elements removed,
    non-projective sentences lifted), so that trees over `words` line up with that gold.
    `options` (default: words as written) says how words become `tokens`, as when training
    read its corpus (`run_read_options`); its `nonprojective` is always "lift". A record that
    gives no sentence (a malformed one, or one with nothing left after the removals, or too
    long for `options.max_length`) raises InputError naming its file and line: a sentence
    dropped here would shift every later output line against the input.
    """
    options = replace(options if options is not None else ReadOptions(), nonprojective="lift")
    stream = CorpusStream(path, fmt, options)
    sentences = list(stream)
    blank = stream.fmt == "text"  # an empty raw-text line is no record
    problems = [r for r in stream.report.skipped if not (blank and r.reason == "empty")]
    if problems:
        first = problems[0]
        detail = f": {first.message}" if first.message else ""
        what = "parsed from its tags" if options.tag_mode else "read"
        raise InputError(f"this sentence cannot be {what} ({first.reason}{detail})",
                         path=first.source, line=first.line, column=first.column)
    if not sentences:
        raise InputError(f"no sentences ({stream.report.sentences_read} records read, all "
                         "blank)", path=stream.path)
    return sentences


def no_usable_sentence(report: ReadReport) -> str:
    """The message for a corpus of which no sentence is used: the counts by reason, and the
    first skipped record with its message, which says why (it names its line)."""
    detail = ", ".join(f"{count} {reason}" for reason, count
                       in sorted(report.skipped_by_reason.items())) or "none"
    first = f"; first: line {report.skipped[0].line}: {report.skipped[0].message}" \
        if report.skipped and report.skipped[0].message else ""
    return f"no usable sentence ({report.sentences_read} read; skipped: {detail}{first})"


def read_tagged(path: str | os.PathLike, fmt: str = "auto") -> list[Sentence] | None:
    """Every sentence of a tagged corpus, for parsing with a grammar trained on tags.

    A bracketed or CoNLL-U file gives each sentence's `words` and its tags as `tokens` (the
    preterminal labels, or UPOS), read by `read_records`. None for raw text, whose tokens are
    the tags themselves with no words beside them. A record that gives no sentence raises
    InputError naming its line: parses must keep one per record.
    """
    if fmt == "auto":
        fmt = detect_format(path)
    if fmt == "text":
        return None
    return read_records(path, fmt, ReadOptions(tag_mode=True))


def write_skip_log(report: ReadReport, path: str | os.PathLike) -> int:
    """Write one line per skipped record of `report` to `path` (UTF-8); returns the count."""
    with open(path, "w", encoding="utf-8") as handle:
        for record in report.skipped:
            handle.write(record.format() + "\n")
    return len(report.skipped)
