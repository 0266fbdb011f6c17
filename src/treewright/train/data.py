"""The training data: the corpora of a config read and encoded (or sentences given in memory),
and the memory budget that decides which sentences one engine call can hold."""

from __future__ import annotations

import dataclasses
import functools
import math
import tempfile
from collections import Counter
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Sequence

import torch
from torch import Tensor

from treewright.corpus import (UD_FUNCTION, UD_FUNCTION_TAGS, ReadOptions, normalization_note,
                               normalization_variants, read_corpus)
from treewright.corpus.lines import iter_word_list
from treewright.engine.memory import inside_outside_bytes
from treewright.errors import InputError
from treewright.params import PARAMETERIZATIONS
from treewright.trees import Tree
from treewright.train.config import TrainConfig
from treewright.train.distributed import StreamedCorpus
from treewright.word_pieces import (barred_positions, cuts_piece, host_side, piece_joins,
                                     sentence_barred)


@dataclass
class TrainData:
    """Word ids of the training and dev sentences, and what the trainer needs beside them."""
    vocab: object
    train_ids: list[list[int]] | StreamedCorpus   # StreamedCorpus with data.stream_chunk
    brackets: list[list[tuple[int, int]]] | None     # per training sentence, when constrained
    dev_ids: list[list[int]]
    dev_words: list[list[str]]
    dev_trees: list[Tree] | None
    notes: list[str]
    pieces: tuple[str, list[list[int]]] | None = None   # host side, barred positions per
                                                        # training sentence (word_pieces)
    head_list: Tensor | None = None   # (V,) float64: the log-weight bias.head_list gives
                                       # each vocabulary id (0: not listed)


def tree_brackets(tree: Tree) -> list[tuple[int, int]]:
    n = len(tree.leaves())
    return sorted({(i, j) for i, j, _ in tree.labeled_spans() if j - i >= 2 and (i, j) != (0, n)})


# Trees of training sentences from a grammar, for `constraints.brackets_from`: given the tokens
# of every training sentence and, per sentence, the positions written joined to the word
# before (`word_pieces.barred_positions`; None when the corpus is streamed), their partial
# brackets (as `tree_brackets` gives them) and a note for the log. Decoding lives above
# `train/`, so the caller hands this in (`induce.trainer`).
BracketSource = Callable[[list[list[str]], list[list[int]] | None],
                         tuple[list[list[tuple[int, int]]], str]]


# Why the grammars training builds cannot use a one-word sentence (`RuleModel.parses_one_word`).
ONE_WORD_REASON = ("the model has no rule for a one-word tree (its root rewrites to a "
                   "nonterminal, and every nonterminal to two children)")


def shortest_trainable(cfg: TrainConfig) -> int:
    """The fewest words a training sentence needs for the model of `cfg` to give it a tree: 1
    for a parameterization whose root may cover one word, else 2 (a warm start is always
    tabular, in the induction layout)."""
    model = PARAMETERIZATIONS[cfg.model.parameterization]
    return 1 if model.parses_one_word and cfg.model.warm_start is None else 2


def load_data(cfg: TrainConfig, bracket_source: BracketSource | None = None) -> TrainData:
    """Read the corpora of `cfg.data` (InputError on bad files), encode them with the training
    vocabulary, and collect the partial brackets when `constraints.train_brackets` asks, or
    from `bracket_source` when `constraints.brackets_from` names a grammar. Training sentences
    the model can give no tree for their length (one word, `shortest_trainable`) are counted in
    a note: they are read and kept as before (their words stay in the vocabulary, and the
    batches and earlier runs' figures are unchanged), but they add nothing to training; a
    corpus of nothing else raises InputError."""
    d = cfg.data
    drop = frozenset(t.strip() for t in (d.drop_tags or "").split(",") if t.strip())
    shortest = shortest_trainable(cfg)
    if d.max_length is not None and d.max_length < shortest:
        raise InputError(f"data.max_length {d.max_length} leaves only sentences of one word, "
                         f"and {ONE_WORD_REASON}", path=str(d.train))
    options = ReadOptions(lowercase=d.lowercase, case_rules=d.case_rules, tag_mode=d.tag_mode,
                          max_length=d.max_length, min_count=d.min_count,
                          max_vocab=d.max_vocab, punct_labels=drop)
    if d.stream_chunk is not None:
        train = StreamedCorpus(d.train, d.format, options, d.stream_chunk)
    else:
        train = read_corpus(d.train, d.format, options)
    notes = ["training corpus: " + train.report.format().replace("\n", "; ")]
    if shortest > 1:
        lengths = Counter(len(s.tokens) for s in train.sentences) \
            if d.stream_chunk is None else sum(train.histograms, Counter())
        one_word, used = lengths.get(1, 0), sum(lengths.values())
        if one_word == used:
            raise InputError(f"every training sentence used ({used}) has one word, and "
                             f"{ONE_WORD_REASON}: there is nothing to train on",
                             path=str(d.train))
        if one_word:
            notes.append(f"{one_word} of the {used} training sentences used have one word and "
                         f"add nothing to training: {ONE_WORD_REASON}")
    vocab = train.vocabulary
    tokens = vocab.words if d.stream_chunk is not None else \
        (t for s in train.sentences for t in s.tokens)
    note = normalization_note(normalization_variants(tokens), "training word")
    if note is not None:
        notes.append(note)
    brackets = None
    if cfg.constraints.train_brackets:
        if any(s.tree is None for s in train.sentences):
            raise InputError("constraints.train_brackets needs trees in the training corpus "
                             "(bracketed trees or CoNLL-U)", path=str(d.train))
        brackets = [tree_brackets(s.tree) for s in train.sentences]
        notes.append(f"partial brackets: {sum(map(len, brackets))} over "
                     f"{len(brackets)} sentences")
    elif cfg.constraints.brackets_from is not None:
        if bracket_source is None:
            raise ValueError("constraints.brackets_from needs a bracket source from the caller "
                             "(treewright.induce.trainer decodes the grammar it names)")
        barred = [sentence_barred(s) for s in train.sentences]
        brackets, note = bracket_source([list(s.tokens) for s in train.sentences], barred)
        notes.append(note)
    dev_ids: list[list[int]] = []
    dev_words: list[list[str]] = []
    dev_trees = None
    if d.dev is not None:
        dev = read_corpus(d.dev, d.format, ReadOptions(
            lowercase=d.lowercase, case_rules=d.case_rules, tag_mode=d.tag_mode,
            max_length=d.max_length, vocabulary=vocab, punct_labels=drop))
        notes.append("dev corpus: " + dev.report.format().replace("\n", "; "))
        note = _dev_unknown_warning(dev.report.unk_rate, train.report.unk_rate, d.dev)
        if note is not None:
            notes.append(note)
        dev_ids = [dev.encode(s) for s in dev.sentences]
        dev_words = [list(s.words) for s in dev.sentences]
        if all(s.tree is not None for s in dev.sentences):
            dev_trees = [s.tree for s in dev.sentences]
    train_ids = train if d.stream_chunk is not None else \
        [train.encode(s) for s in train.sentences]
    pieces = None if d.stream_chunk is not None else _word_pieces(cfg, train.sentences, notes)
    if brackets is not None and pieces is not None:
        note = _brackets_cutting_pieces(brackets, pieces)
        if note is not None:
            notes.append(note)
    head_list = None
    if cfg.bias.head_list is not None:
        head_list = head_list_weights(cfg, vocab, notes)
    return TrainData(vocab, train_ids, brackets, dev_ids, dev_words, dev_trees, notes, pieces,
                     head_list)


# More than this share of the dev tokens read as the unknown word draws a warning.
DEV_UNKNOWN_WARNING = 0.5


def _dev_unknown_warning(dev_rate: float | None, train_rate: float | None,
                         path) -> str | None:
    """A warning when most dev tokens are not training words: the dev likelihood then scores
    the unknown word more than the text, and can beat the training figures."""
    if dev_rate is None or dev_rate <= DEV_UNKNOWN_WARNING:
        return None
    against = f" (training: {train_rate:.2%})" if train_rate is not None else ""
    return (f"warning: {dev_rate:.2%} of the dev tokens of {path} are read as the unknown word"
            f"{against}, so the dev likelihood and perplexity mostly score that one word and "
            f"can look better than training's; is the dev file tokenized as the training text "
            f"is? (a CoNLL-U file gives its syntactic words, raw text the words as written)")


def read_head_list(path: str | Path, lowercase: bool) -> list[tuple[str, float | None]]:
    """The entries of a word-list file (`bias.head_list`): one word per line, optionally
    followed by its own log-weight, blank lines and lines starting with # skipped, words
    lowercased with the training text. InputError (naming the line) for a line of three or more
    fields or a weight that is not a finite number, and for a file with no word."""
    entries: list[tuple[str, float | None]] = []
    for number, fields, line in iter_word_list(path):
        if len(fields) > 2:
            raise InputError(f"a word and at most one weight per line, found {len(fields)} "
                             f"fields: {line.strip()!r}", path=str(path), line=number)
        weight = None
        if len(fields) == 2:
            try:
                weight = float(fields[1])
            except ValueError:
                weight = math.nan
            if not math.isfinite(weight):
                raise InputError(f"the weight of {fields[0]!r} is not a finite number: "
                                 f"{fields[1]!r}", path=str(path), line=number)
        entries.append((fields[0].lower() if lowercase else fields[0], weight))
    if not entries:
        raise InputError("lists no words (every line is blank or a comment)", path=str(path))
    return entries


def head_list_weights(cfg: TrainConfig, vocab, notes: list[str]) -> Tensor:
    """(V,) float64 over the training vocabulary: the log-weight `bias.head_list` gives each
    word (its own, else `bias.head_weight`; 0 for words not listed). Listed words the training
    text never uses are left out, and the note says how many."""
    source = cfg.bias.head_list
    if source == UD_FUNCTION:
        entries: list[tuple[str, float | None]] = [(t, None) for t in UD_FUNCTION_TAGS]
        where = "the function-word tags of Universal Dependencies"
    else:
        entries, where = read_head_list(source, cfg.data.lowercase), str(source)
    weights = torch.zeros(len(vocab), dtype=torch.float64)
    used: dict[str, float] = {}
    for word, weight in entries:    # a word listed twice takes its last weight
        if word in vocab.index:
            used[word] = cfg.bias.head_weight if weight is None else weight
    absent = len({w for w, _ in entries}) - len(used)
    if not used:
        raise InputError("none of the words of bias.head_list occurs in the training "
                         "vocabulary", path=None if source == UD_FUNCTION else str(source))
    if not any(used.values()):
        raise InputError("every listed word weighs 0 (set bias.head_weight, or a weight per "
                         "word), so the list would change nothing",
                         path=None if source == UD_FUNCTION else str(source))
    for word, weight in used.items():
        weights[vocab.index[word]] = weight
    counts: dict[float, int] = {}
    for weight in used.values():
        counts[weight] = counts.get(weight, 0) + 1
    spread = ", ".join(f"{w:g} for {n}" for w, n in sorted(counts.items()))
    notes.append(f"head list ({where}): {len(used)} words in the training vocabulary"
                 + (f", {absent} listed but unused" if absent else "")
                 + f"; the log-weight of each dependent they take in training: {spread}")
    return weights


def _word_pieces(cfg: TrainConfig, sentences, notes: list[str]
                 ) -> tuple[str, list[list[int]]] | None:
    """The word-piece constraint of `constraints.word_pieces` for the training sentences: the
    host side and, per sentence, the barred positions; None when unconstrained. Notes why."""
    mode = cfg.constraints.word_pieces
    # Punctuation written against a word is no piece of it (`word_pieces.piece_joins`).
    joined = [piece_joins(s.words, s.joined, s.tags) for s in sentences]
    if mode == "none" or not any(j and any(j) for j in joined):
        return None
    if mode == "auto":
        # Written forms, case folded, so a capitalised first word still counts as standing alone.
        found = host_side([([w.lower() for w in s.words], joins)
                           for s, joins in zip(sentences, joined)])
        notes.append(found.describe())
        side = found.side
    else:
        side = mode.removeprefix("host-")
        notes.append(f"word pieces: the host comes {side}, as configured")
    if side is None:
        return None
    return side, [barred_positions(joins) for joins in joined]


def _brackets_cutting_pieces(brackets: list[list[tuple[int, int]]],
                             pieces: tuple[str, list[list[int]]]) -> str | None:
    """A note on the partial brackets that cut a bound piece from its host, which `make_batch`
    leaves out while the word-piece constraint applies; None when there are none."""
    side, barred = pieces
    cut = [sum(cuts_piece(side, set(positions), i, j) for i, j in spans)
           for spans, positions in zip(brackets, barred)]
    if not any(cut):
        return None
    return (f"partial brackets: {sum(cut)} of {sum(map(len, brackets))} (in "
            f"{sum(map(bool, cut))} sentences) cut a bound piece from its host; while the "
            "word-piece constraint applies they are left out, so that those sentences keep "
            "their trees")


def summary(data: TrainData) -> dict:
    """What the readers reported, as data (the run folder's data_summary.json)."""
    train = data.train_ids
    return {"notes": list(data.notes), "vocabulary": len(data.vocab),
            "train_sentences": len(train),
            "train_words": None if isinstance(train, StreamedCorpus) else sum(map(len, train)),
            "dev_sentences": len(data.dev_ids), "dev_words": sum(map(len, data.dev_ids)),
            "dev_trees": data.dev_trees is not None,
            # "first" or "last": the end of a split written word that holds its host, as the
            # word-piece constraint found or was told it; None: no constraint
            "word_pieces_host": None if data.pieces is None else data.pieces[0]}


class MemoryBudget:
    """The per-sentence cost of one inside-outside call (`engine.memory`), the budget in bytes
    (None: no budget) and the longest sentence that fits it alone."""

    def __init__(self, cfg: TrainConfig, dtype: torch.dtype):
        m = cfg.model
        self.sizes = (m.nonterminals, m.preterminals, torch.finfo(dtype).bits // 8)
        self.shape = PARAMETERIZATIONS[m.parameterization].memory_shape(m)
        mb = cfg.train.memory_budget_mb
        self.max_bytes = None if mb is None else mb * 2 ** 20

    def sentence_bytes(self, length: int) -> float:
        nt, t, itemsize = self.sizes
        return inside_outside_bytes(1, length, nt, t, itemsize, **self.shape)

    @functools.cached_property
    def max_length(self) -> float:
        if self.max_bytes is None:
            return math.inf
        length = 0
        while length < 100_000 and self.sentence_bytes(length + 1) <= self.max_bytes:
            length += 1
        return length


def data_from_sentences(cfg: TrainConfig, sentences: Sequence[Sequence[str]],
                        dev: Sequence[Sequence[str]] | None = None,
                        dev_trees: Sequence[Tree] | None = None,
                        bracket_source: BracketSource | None = None) -> TrainData:
    """`load_data` for token lists in memory (`dev`: token lists, or `dev_trees`: gold trees).
    They go through the corpus readers exactly as files would (one sentence a line, trees in
    brackets, in a temporary folder), so that the options of `cfg.data` apply alike and a
    grammar fitted from memory is the one the same files give."""
    if dev is not None and dev_trees is not None:
        raise ValueError("give dev sentences or dev trees, not both")
    for name, part in (("sentences", sentences), ("dev", dev or [])):
        for k, tokens in enumerate(part):
            if not tokens or any(not t or any(c.isspace() for c in t) for t in tokens):
                raise InputError(f"{name}[{k}] is empty or has a token that is empty or holds "
                                 "white space", path=f"<{name}>", line=k + 1)
    with tempfile.TemporaryDirectory(prefix="treewright-data-") as folder:
        train_path = Path(folder) / "train.txt"
        train_path.write_text("".join(" ".join(s) + "\n" for s in sentences), encoding="utf-8")
        dev_path = None
        if dev is not None:
            dev_path = Path(folder) / "dev.txt"
            dev_path.write_text("".join(" ".join(s) + "\n" for s in dev), encoding="utf-8")
        elif dev_trees is not None:
            dev_path = Path(folder) / "dev.trees"
            dev_path.write_text("".join(t.to_string() + "\n" for t in dev_trees),
                                encoding="utf-8")
        fmt = cfg.data.format if dev_path is None or dev_trees is None else "auto"
        data_options = dataclasses.replace(cfg.data, train=str(train_path), format=fmt,
                                           dev=None if dev_path is None else str(dev_path),
                                           stream_chunk=None)
        return load_data(dataclasses.replace(cfg, data=data_options), bracket_source)
