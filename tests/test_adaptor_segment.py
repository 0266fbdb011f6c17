"""Segmentation with adaptor grammars (issue 23): character input, the segmentation an analysis
gives, the lexicon, and boundary and token scores against a gold segmentation."""

from __future__ import annotations

import pytest
from sklearn.metrics import precision_recall_fscore_support

from test_adaptor import NESTED, WORDS
from treewright.adaptor import AdaptorSampler, characters, parse_utterances, segment, top_spans
from treewright.errors import InputError
from treewright.evaluation import evaluate_segmentation
from treewright.evaluation.segmentation import boundaries
from treewright.grammar import parse_grammar

GOLD = [["kelu", "mar", "ti"], ["sonavi"]]
PRED = [["ke", "lumar", "ti"], ["sona", "vi"]]


def test_scores_computed_by_hand():
    # By hand: "kelumarti" has gold boundaries {4, 7} and predicted {2, 7}; "sonavi" none and
    # {4}. Boundaries: 1 correct of 3 predicted and 2 gold: P 1/3, R 1/2, F1 0.4. Tokens:
    # only "ti" (7, 9) matches: 1 of 5 predicted and 4 gold: P 0.2, R 0.25, F1 2/9.
    s = evaluate_segmentation(PRED, GOLD)
    assert (s.boundaries.correct, s.boundaries.predicted, s.boundaries.gold) == (1, 3, 2)
    assert s.boundaries.precision == pytest.approx(1 / 3)
    assert s.boundaries.recall == pytest.approx(1 / 2)
    assert s.boundaries.f1 == pytest.approx(0.4)
    assert (s.tokens.correct, s.tokens.predicted, s.tokens.gold) == (1, 5, 4)
    assert s.tokens.precision == pytest.approx(0.2)
    assert s.tokens.recall == pytest.approx(0.25)
    assert s.tokens.f1 == pytest.approx(2 / 9)
    assert s.utterances == 2


def test_boundary_scores_match_scikit_learn():
    # Reference library: boundary P/R/F1 are binary P/R/F1 over the inner positions of every
    # utterance (scikit-learn's precision_recall_fscore_support, average="binary").
    pred = PRED + [["ta", "ro", "ka"], ["mi", "ri"]]
    gold = GOLD + [["taro", "ka"], ["m", "i", "r", "i"]]
    y_pred, y_true = [], []
    for p, g in zip(pred, gold):
        n = len("".join(g))
        y_pred += [int(k in boundaries(p)) for k in range(1, n)]
        y_true += [int(k in boundaries(g)) for k in range(1, n)]
    p, r, f, _ = precision_recall_fscore_support(y_true, y_pred, average="binary")
    s = evaluate_segmentation(pred, gold).boundaries
    assert (s.precision, s.recall, s.f1) == pytest.approx((p, r, f))


def test_a_segmentation_of_other_characters_is_refused():
    with pytest.raises(InputError, match="gold, line 2: the segmentation joins to 'sonav'"):
        evaluate_segmentation([["kelumarti"], ["sonav"]], GOLD, source="gold")
    with pytest.raises(InputError, match="2 segmented utterances against 1"):
        evaluate_segmentation(PRED, GOLD[:1])


def test_utterances_are_read_as_characters_and_gold_words():
    u = parse_utterances(["kelu mar ti", "", "  sonavi  ", "\t"])
    assert u.characters == [list("kelumarti"), list("sonavi")]
    assert u.gold == GOLD
    assert u.lines == [1, 3]
    assert u.blank == 2
    assert characters("ka lu") == ["k", "a", "l", "u"]


def test_a_character_is_a_grapheme_cluster_not_a_code_point():
    # Fact of the trade (Unicode Standard Annex #29, extended grapheme clusters): a letter with
    # a combining mark, a Devanagari consonant with its dependent vowel sign (U+0940, U+093F),
    # a Hangul syllable written as conjoining jamo each read as one character, and U+200D
    # stays with what precedes it (rule GB9) but joins two letters into one character only
    # between pictographs (GB11); written by hand from the standard's rules, not from our code.
    assert characters("te\u0301ka") == ["t", "e\u0301", "k", "a"]
    assert characters("\u0928\u0940\u0932\u093e \u0915\u093f") == \
        ["\u0928\u0940", "\u0932\u093e", "\u0915\u093f"]
    assert characters("\u1112\u1161\u11ab\u1100\u1161") == \
        ["\u1112\u1161\u11ab", "\u1100\u1161"]
    assert characters("a\u200db c") == ["a\u200d", "b", "c"]
    assert characters("\U0001F33F\u200d\U0001F33F") == ["\U0001F33F\u200d\U0001F33F"]


def test_utterance_files_lose_their_byte_order_mark_and_name_a_bad_line(tmp_path):
    # Common practice: a UTF-8 byte-order mark is not text, and CRLF line ends are line ends;
    # bytes that are not UTF-8 are refused with the file and line they are on.
    from treewright.adaptor import read_utterances
    path = tmp_path / "lines.txt"
    path.write_bytes("\ufeffkelu mar\r\n\r\nso\u0301navi\r\n".encode("utf-8"))
    read = read_utterances(path)
    assert read.characters == [list("kelumar"), ["s", "o\u0301", "n", "a", "v", "i"]]
    assert read.gold == [["kelu", "mar"], ["so\u0301navi"]]
    assert (read.lines, read.blank) == ([1, 3], 1)
    path.write_bytes(b"kelu\nma\xe9r\n")
    with pytest.raises(InputError, match="not UTF-8") as err:
        read_utterances(path)
    assert err.value.line == 2 and str(path) in str(err.value)


def test_segment_cuts_at_the_top_most_nodes_of_the_symbol():
    g = parse_grammar(WORDS)
    ids = {n: i for i, n in enumerate(g.symbols)}
    a, b = g.vocab.index["a"], g.vocab.index["b"]
    # Words(Word "a", Word(Char "b", Chars "a")) over "aba": words a | ba, read by hand.
    tree = (ids["Words"], (ids["Word"], a),
            (ids["Word"], (ids["Char"], b), (ids["Chars"], a)))
    assert top_spans(tree, ids["Word"]) == [(0, 1), (1, 3)]
    assert segment(tree, ids["Word"], list("aba")) == ["a", "ba"]
    # Chars inside the second Word, and Char: cuts at their own edges only.
    assert segment(tree, ids["Chars"], list("aba")) == ["ab", "a"]
    n = parse_grammar(NESTED)
    ids = {name: i for i, name in enumerate(n.symbols)}
    a, b = n.vocab.index["a"], n.vocab.index["b"]
    # Word(Part(Part a, Part a), Part b) over "aab": one word, two top-most parts aa | b.
    tree = (ids["Word"], (ids["Part"], (ids["Part"], a), (ids["Part"], a)), (ids["Part"], b))
    assert segment(tree, ids["Word"], list("aab")) == ["aab"]
    assert segment(tree, ids["Part"], list("aab")) == ["aa", "b"]


def test_sampler_segmentations_and_lexicon():
    u = parse_utterances(["ab ab", "ba", "ab a b"])
    sampler = AdaptorSampler(parse_grammar(WORDS), u.characters, seed=1)
    sampler.run(5)
    segs = sampler.segmentations("Word")
    assert ["".join(s) for s in segs] == ["".join(c) for c in u.characters]
    scores = evaluate_segmentation(segs, u.gold)
    assert 0.0 <= scores.tokens.f1 <= 1.0
    lex = sampler.lexicon("Word")
    cache = sampler.chains[0].cache
    word = sampler.rules.names.index("Word")
    # Every Word customer and table is listed once (a fact of the representation).
    assert sum(c for _, c, _ in lex) == cache.customers[word]
    assert sum(t for _, _, t in lex) == cache.num_tables[word]
    assert [c for _, c, _ in lex] == sorted((c for _, c, _ in lex), reverse=True)
    # The words used by the segmentations are exactly the cached Word yields.
    assert {w for s in segs for w in s} == {text for text, _, _ in lex}
    with pytest.raises(ValueError, match="Chars is not adapted"):
        sampler.lexicon("Chars")


def test_unigram_word_grammar_by_hand():
    from treewright.adaptor import Cache, Rules
    from treewright.adaptor.grammars import unigram_word_grammar
    g = unigram_word_grammar("abba", discount=0.25, concentration=3.0)
    assert g.adapted == {"Word": (0.25, 3.0)}
    assert g.normalization_error() < 1e-12  # each left-hand side sums to one (common practice)
    assert parse_grammar(g.to_text()).to_text() == g.to_text()
    ids = {n: i for i, n in enumerate(g.symbols)}
    a, b = g.vocab.index["a"], g.vocab.index["b"]
    cache = Cache(Rules.from_grammar(g))
    # By hand, alphabet {a, b}, continuation 0.5: the base spells "ab" as Word -> Char Chars
    # (0.5), Char -> a (1/2), Chars -> b (0.5 * 1/2): 1/16; the first Word always opens a table.
    assert cache.predictive((ids["Word"], (ids["Char"], a), (ids["Chars"], b))) == \
        pytest.approx(1 / 16)
    # A one-character word: Word -> a, 0.5 * 1/2.
    assert cache.predictive((ids["Word"], a)) == pytest.approx(1 / 4)


def test_the_readme_example_runs(tmp_path, monkeypatch, capsys):
    from pathlib import Path
    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
    section = readme.split("### Adaptor grammars", 1)[1]
    block = section.split("```python\n", 1)[1].split("```", 1)[0]
    monkeypatch.chdir(tmp_path)
    exec(compile(block, "README.md", "exec"), {})
    printed = capsys.readouterr().out.splitlines()
    assert 0.0 <= float(printed[0]) <= 1.0
    assert AdaptorSampler.load(tmp_path / "chains.json").state()["sentences"][1] == list("markelu")
