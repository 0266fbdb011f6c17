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
                  more_suffixes: float = 0.5, more_characters: float = 0.5) -> Grammar:
    """A word as a stem and suffixes (one input sentence is one written word), in Chomsky
    normal form, with Stem and Suffix adapted (each its own Pitman-Yor cache, both with
    `discount` and `concentration`), so recurring stems and recurring suffixes are each reused
    whole. The shape is that of Johnson, Griffiths & Goldwater 2007 (section 5, the morphology
    grammar Word -> Stem Suffix), with any number of suffixes:

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
    """
    chars = sorted(set(alphabet))
    if not chars:
        raise ValueError("the alphabet is empty")
    one = 1.0 / len(chars)
    stop, go = 1.0 - more_suffixes, more_suffixes
    end, grow = 1.0 - more_characters, more_characters
    lines = ["@start ROOT",
             f"@adapted Stem discount {discount!r} concentration {concentration!r}",
             f"@adapted Suffix discount {discount!r} concentration {concentration!r}",
             f"ROOT -> Stem {stop!r}", f"ROOT -> Word {go!r}",
             f"Word -> Stem Suffix {stop!r}", f"Word -> Stem Suffixes {go!r}",
             f"Suffixes -> Suffix Suffix {stop!r}", f"Suffixes -> Suffix Suffixes {go!r}",
             f"Stem -> Char Chars {grow!r}", f"Suffix -> Char Chars {grow!r}",
             f"Chars -> Char Chars {grow!r}"]
    for c in chars:
        lines += [f"Stem -> {quote(c)} {end * one!r}", f"Suffix -> {quote(c)} {end * one!r}",
                  f"Chars -> {quote(c)} {end * one!r}", f"Char -> {quote(c)} {one!r}"]
    return parse_grammar("\n".join(lines) + "\n", source="<morph grammar>", renormalize=True)
