"""Adaptor grammars that segmentation starts from, written in the grammar text format.

The unigram word grammar (Johnson, Griffiths & Goldwater 2007, section 5: an utterance is a
sequence of Words, Word is adapted, and its base spells a word out character by character), in
Chomsky normal form:

    ROOT -> Word | Words            a one-word utterance, or more
    Words -> Word Words | Word Word
    Word -> c | Char Chars          (adapted) a one-character word, or longer
    Chars -> c | Char Chars
    Char -> c                       each character c of the alphabet, equally likely

The probabilities of continuing (another word, another character) are parameters; the base
word length is geometric, and the base spells words uniformly over the alphabet.
"""

from __future__ import annotations

from typing import Iterable

from treewright.grammar import Grammar, parse_grammar, quote

SUBMORPH_BUILT = 0.5  # p(a stem or suffix is built of submorphs), with morph_grammar(submorphs)


def unigram_word_grammar(alphabet: Iterable[str], discount: float = 0.5,
                         concentration: float = 10.0, more_words: float = 0.5,
                         more_characters: float = 0.5) -> Grammar:
    """The unigram word-segmentation adaptor grammar over `alphabet` (its distinct characters).

    more_words       p(another word follows), for ROOT and Words alike
    more_characters  p(another character follows), for Word and Chars alike
    """
    chars = sorted(set(alphabet))
    if not chars:
        raise ValueError("the alphabet is empty")
    one = 1.0 / len(chars)
    stop, go = 1.0 - more_words, more_words
    end, grow = 1.0 - more_characters, more_characters
    lines = ["@start ROOT", f"@adapted Word discount {discount!r} concentration "
             f"{concentration!r}",
             f"ROOT -> Word {stop!r}", f"ROOT -> Words {go!r}",
             f"Words -> Word Words {go!r}", f"Words -> Word Word {stop!r}",
             f"Word -> Char Chars {grow!r}", f"Chars -> Char Chars {grow!r}"]
    for c in chars:
        lines += [f"Word -> {quote(c)} {end * one!r}", f"Chars -> {quote(c)} {end * one!r}",
                  f"Char -> {quote(c)} {one!r}"]
    return parse_grammar("\n".join(lines) + "\n", source="<unigram word grammar>",
                         renormalize=True)


def morph_grammar(alphabet: Iterable[str], discount: float = 0.5, concentration: float = 10.0,
                  more_suffixes: float = 0.5, more_characters: float = 0.5,
                  submorphs: bool = False, prefixes: bool = False,
                  more_prefixes: float = 0.5) -> Grammar:
    """A word as a stem and suffixes, and with `prefixes` prefixes before the stem (one input
    sentence is one written word), in Chomsky normal form, with Stem and Suffix adapted (each
    its own Pitman-Yor cache, both with `discount` and `concentration`), so recurring stems and
    recurring suffixes are each reused whole. The shape is that of Johnson, Griffiths &
    Goldwater 2007 (section 5, the morphology grammar Word -> Stem Suffix), with any number of
    suffixes:

        ROOT -> Stem | Word             a bare stem, or a stem with suffixes
        Word -> Stem Suffix | Stem Suffixes
        Suffixes -> Suffix Suffix | Suffix Suffixes
        Stem -> c | Char Chars          (adapted)
        Suffix -> c | Char Chars        (adapted)
        Chars -> c | Char Chars
        Char -> c                       each character c of the alphabet, equally likely

    more_suffixes    p(a suffix follows the stem), and p(another follows a suffix): the base
                     number of suffixes is geometric
    more_characters  p(another character follows) in stems and suffixes alike
    submorphs        also let a stem or suffix be built from two or more cached pieces (a
                     SubMorph level under both, after the submorph grammars of Sirts &
                     Goldwater 2013, "Minimally-Supervised Morphological Segmentation using
                     Adaptor Grammars", TACL 1), with even odds against spelling it out:

        Stem -> c | Char Chars                  (adapted) spelled out, as above, or
        Stem -> SubMorph SubMorph | SubMorph SubMorphs    built of submorphs
        Suffix -> the same                      (adapted)
        SubMorphs -> SubMorph SubMorph | SubMorph SubMorphs
        SubMorph -> c | Char Chars              (adapted)

                     A rare stem can then reuse recurring pieces and stay one stem, where the
                     plain grammar makes it cheaper to cut it into a cached stem and
                     "suffixes". SubMorph edges are not cuts: the units are still the
                     top-most Stem and Suffix subtrees. (A one-piece stem is spelled out
                     directly, since the grammar format has no unary rules below the start.)
    prefixes         also let prefixes precede the stem, an adapted Prefix spelled out (or
                     built of submorphs) as a Suffix is, so that languages that inflect or
                     derive at the front of the word are segmented there too:

        ROOT -> Stem | Word | Prefixed
        Prefixed -> P Stem | P Word             P: Prefix, or Prefixes
        Prefixes -> Prefix Prefix | Prefix Prefixes
        Prefix -> c | Char Chars                (adapted; or of submorphs, as Suffix)

    more_prefixes    with prefixes: p(a prefix precedes the stem), and p(another precedes a
                     prefix); the base number of prefixes is geometric, as of suffixes
    """
    chars = sorted(set(alphabet))
    if not chars:
        raise ValueError("the alphabet is empty")
    one = 1.0 / len(chars)
    stop, go = 1.0 - more_suffixes, more_suffixes
    end, grow = 1.0 - more_characters, more_characters
    morphs = ("Prefix", "Stem", "Suffix") if prefixes else ("Stem", "Suffix")
    units = morphs + ("SubMorph",) if submorphs else morphs
    spelled = 1.0 - SUBMORPH_BUILT if submorphs else 1.0  # p(a stem is spelled out)
    lines = ["@start ROOT"]
    lines += [f"@adapted {a} discount {discount!r} concentration {concentration!r}"
              for a in units]
    bare = 1.0 - more_prefixes if prefixes else 1.0   # p(no prefix)
    lines += [f"ROOT -> Stem {bare * stop!r}", f"ROOT -> Word {bare * go!r}"]
    if prefixes:
        first, more = 1.0 - more_prefixes, more_prefixes
        lines.append(f"ROOT -> Prefixed {more_prefixes!r}")
        lines += [f"Prefixed -> {front} {rest} {odds * after!r}"
                  for front, odds in (("Prefix", first), ("Prefixes", more))
                  for rest, after in (("Stem", stop), ("Word", go))]
        lines += [f"Prefixes -> Prefix Prefix {first!r}",
                  f"Prefixes -> Prefix Prefixes {more!r}"]
    lines += [f"Word -> Stem Suffix {stop!r}", f"Word -> Stem Suffixes {go!r}",
              f"Suffixes -> Suffix Suffix {stop!r}", f"Suffixes -> Suffix Suffixes {go!r}"]
    lines += [f"{a} -> Char Chars {spelled * grow!r}" for a in morphs]
    if submorphs:
        built = SUBMORPH_BUILT
        lines += [f"{a} -> SubMorph {rest} {built * odds!r}" for a in morphs
                  for rest, odds in (("SubMorph", stop), ("SubMorphs", go))]
        lines += [f"SubMorphs -> SubMorph SubMorph {stop!r}",
                  f"SubMorphs -> SubMorph SubMorphs {go!r}", f"SubMorph -> Char Chars {grow!r}"]
    lines.append(f"Chars -> Char Chars {grow!r}")
    for c in chars:
        lines += [f"{a} -> {quote(c)} {spelled * end * one!r}" for a in morphs]
        if submorphs:
            lines.append(f"SubMorph -> {quote(c)} {end * one!r}")
        lines += [f"Chars -> {quote(c)} {end * one!r}", f"Char -> {quote(c)} {one!r}"]
    return parse_grammar("\n".join(lines) + "\n", source="<morph grammar>", renormalize=True)
