"""Morph segmentation on a CoNLL-U corpus: its orthographic words as character input, with
gold boundaries where the syntactic tokens of one written word meet.

A tokenizer may write one orthographic word as several syntactic tokens: a multiword-token
range, or `SpaceAfter=No` between them (the Turkish web treebank writes `kullanmaya` as
`kullan` + `maya`). The reader marks these as `Sentence.joined`; the orthographic word is the
run of tokens joined to the one before, and its gold morphs are those tokens. Words and gold
morphs alike are lowercased by `corpus.lowercase` under the case rules given (Unicode's
language-independent mapping by default; "turkic" for Turkish and Azerbaijani, where I and
dotted capital I lower to dotless and dotted i), so gold and input hold the same characters.

Punctuation tokens (UPOS PUNCT) are taken out before the words are formed: a comma written
against a word is not one of its morphs, and the reader then leaves the tokens around it
unjoined (`corpus.reader.joined_without`), unless they share one multiword token.

A multiword token whose words run together do not spell it (a contraction: the treebank writes
`au` as `à` + `le`, or restores a letter the spelling leaves out) has no gold boundaries in
the written word, and its tokens run together are a word nobody wrote. Such words are set
aside, counted, with an example (`WrittenWords.contracted`): they are neither segmented nor
scored.

Baselines (common practice for boundary scores): no split predicts no boundary (precision,
recall and F1 all 0 by the convention of `evaluation.segmentation`), and a split at every
character predicts every position (recall 1, precision the share of positions that are gold
boundaries).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterable, Sequence

from treewright.adaptor.model import Tree
from treewright.adaptor.sampler import AdaptorSampler
from treewright.adaptor.segment import boundaries, characters, cut
from treewright.corpus import ReadOptions, lowercase, read_corpus
from treewright.evaluation.segmentation import SegmentationScores, evaluate_segmentation
from treewright.word_pieces import written_forms

PUNCT = frozenset({"PUNCT"})
MORPH_SYMBOLS = ("Stem", "Suffix")  # the units of `grammars.morph_grammar` (adapted)
PREFIX = "Prefix"  # a unit too, with `morph_grammar(prefixes=True)`
SUBMORPH = "SubMorph"  # the pieces they may be built of, with `morph_grammar(submorphs=True)`


def morph_units(names: Sequence[str]) -> tuple[str, ...]:
    """The unit symbols of a morph grammar whose symbols are `names`: Prefix when it has one,
    Stem and Suffix (its segmentation cuts at their edges)."""
    return tuple(a for a in (PREFIX,) if a in names) + MORPH_SYMBOLS


@dataclass(frozen=True)
class WrittenWords:
    """The orthographic words of a corpus, in corpus order (one entry per occurrence).

    morphs     per word, its syntactic tokens lowercased (the gold morphs; one for an unsplit word)
    sentences  the sentences used
    skipped    sentences the reader skipped (too short: left empty once punctuation is out)
    contracted the occurrences set aside, each as (written form, its tokens), lowercased: words
               with a multiword token whose tokens do not spell it (see the module docstring)
    """

    morphs: list[list[str]]
    sentences: int
    skipped: int
    contracted: list[tuple[str, list[str]]] = field(default_factory=list)

    @property
    def split(self) -> list[list[str]]:
        """The words written as two or more syntactic tokens."""
        return [m for m in self.morphs if len(m) > 1]

    def types(self) -> list[str]:
        """The distinct written words, in order of first occurrence."""
        return list(dict.fromkeys("".join(m) for m in self.morphs))

    def first_morphs(self) -> dict[str, list[str]]:
        """Each distinct written word (in order of first occurrence) with the gold morphs of
        its first occurrence: the inputs of a morph segmentation run and their gold."""
        first: dict[str, list[str]] = {}
        for m in self.morphs:
            first.setdefault("".join(m), m)
        return first


def orthographic_words(sentences: Iterable[tuple], case_rules: str = "default"
                       ) -> list[list[str]]:
    """The orthographic words of (tokens, joined) or (tokens, joined, contracted) sentences,
    each as its tokens lowercased under `case_rules` (`corpus.lowercase`). A sentence whose
    joins the source does not give (joined None) has one word per token. Words with a
    contracted multiword token (`Sentence.contracted`) are left out: `written_words` gives
    them."""
    return [m for m, written in written_words(sentences, case_rules) if written is None]


def written_words(sentences: Iterable[tuple], case_rules: str = "default"
                  ) -> list[tuple[list[str], str | None]]:
    """Each orthographic word of `sentences` (as `orthographic_words` takes them) as its
    lowercased tokens, with None, or, when the word holds a multiword token that its tokens
    do not spell, the word as written (lowercased; `word_pieces.written_forms`)."""
    out: list[tuple[list[str], str | None]] = []
    for tokens, joined, *rest in sentences:
        contracted = rest[0] if rest else None
        for k, end, form in written_forms(tokens, joined, contracted):
            morphs = [lowercase(t, case_rules) for t in tokens[k:end]]
            unspelled = contracted is not None and any(c is not None
                                                       for c in contracted[k:end])
            out.append((morphs, lowercase(form, case_rules) if unspelled else None))
    return out


def read_written_words(path: str | Path, case_rules: str = "default") -> WrittenWords:
    """The orthographic words of a CoNLL-U file, punctuation taken out (non-projective
    sentences are kept: their arcs are lifted, which leaves the words as they are), lowercased
    under `case_rules`; words with a contracted multiword token set aside
    (`WrittenWords.contracted`)."""
    corpus = read_corpus(path, "conllu", ReadOptions(nonprojective="lift", punct_labels=PUNCT))
    words = written_words(((s.words, s.joined, s.contracted) for s in corpus.sentences),
                          case_rules)
    return WrittenWords([m for m, w in words if w is None], len(corpus.sentences),
                        corpus.report.sentences_skipped,
                        [(w, m) for m, w in words if w is not None])


def baseline_scores(gold: Sequence[Sequence[str]]) -> dict[str, SegmentationScores]:
    """Scores of the no-split and split-every-character baselines against `gold` morphs."""
    whole = [["".join(m)] for m in gold]
    chars = [characters("".join(m)) for m in gold]
    return {"no split": evaluate_segmentation(whole, gold),
            "every character": evaluate_segmentation(chars, gold)}


def morph_cuts(tree: Tree, symbols: Sequence[int], chars: Sequence[str]) -> list[str]:
    """The morphs an analysis gives: `chars` cut at every edge of a top-most node of any of
    `symbols` (Prefix, Stem and Suffix in `grammars.morph_grammar`)."""
    return cut(chars, boundaries(tree, symbols, len(chars)))


def morph_segmentations(sampler: AdaptorSampler, chain: int = 0,
                        symbols: Sequence[str] | None = None) -> list[list[str]]:
    """Each written word of `sampler` cut into morphs by chain `chain`'s analysis, at the edges
    of `symbols` (default: the grammar's `morph_units`)."""
    if symbols is None:
        symbols = morph_units(sampler.rules.names)
    ids = [sampler.rules.names.index(s) for s in symbols]
    return [morph_cuts(t, ids, w) for t, w in zip(sampler.trees(chain), sampler.words)]


def by_type(segmented: dict[str, list[str]], words: Sequence[Sequence[str]]) -> list[list[str]]:
    """The segmentation of every word occurrence (gold morphs `words`) as its type's."""
    return [segmented["".join(m)] for m in words]
