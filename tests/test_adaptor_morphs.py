"""Orthographic words of a CoNLL-U corpus with gold morph boundaries at the joins of their
syntactic tokens, the two baselines, and the counts on the Turkish web treebank (PyPI
turkish-treebanks)."""

from __future__ import annotations

import io
import json
import math
import sys
import sysconfig
import unicodedata
from pathlib import Path

import pytest

from _brute import all_trees
from test_adaptor_run import _stopped_in_sweep
from treewright.adaptor import AdaptorSampler, characters
from treewright.adaptor.config import load_segment_config
from treewright.adaptor.grammars import morph_grammar
from treewright.adaptor.morphs import (baseline_scores, morph_cuts, morph_units,
                                       orthographic_words, read_written_words)
from treewright.adaptor.posterior import BoundaryTally
from treewright.adaptor.run import segment_resume, segment_words
from treewright.config import ConfigError
from treewright.evaluation import evaluate_segmentation

TREEBANK = Path(sysconfig.get_paths()["purelib"]) / "data"
REPO = Path(__file__).resolve().parents[1]

# Invented text in the CoNLL-U format (an open standard), heads omitted. Worked out by hand:
#   sentence 1: "Orrin" | "velo" = ve+lo (multiword token 2-3) | "Marratund" = Marra+tund
#               (SpaceAfter=No on 4) | "kal" then "," with SpaceAfter=No before "bri": the comma
#               is punctuation and is taken out, so "kal" and "bri" are words of their own.
#   sentence 2: "Eskomanu" = Esko+ma+nu (SpaceAfter=No on 1 and 2) | "sel".
# Orthographic words: orrin, ve|lo, marra|tund, kal, bri, esko|ma|nu, sel (7 words, 3 split,
# 4 gold boundaries: after "ve", after "marra", after "esko" and after "eskoma").
TOKENIZED = """\
# sent_id = quay-1
1\tOrrin\t_\tPROPN\t_\t_\t_\t_\t_\t_
2-3\tvelo\t_\t_\t_\t_\t_\t_\t_\t_
2\tve\t_\tADP\t_\t_\t_\t_\t_\t_
3\tlo\t_\tDET\t_\t_\t_\t_\t_\t_
4\tMarra\t_\tNOUN\t_\t_\t_\t_\t_\tSpaceAfter=No
5\ttund\t_\tNOUN\t_\t_\t_\t_\t_\t_
6\tkal\t_\tVERB\t_\t_\t_\t_\t_\tSpaceAfter=No
7\t,\t_\tPUNCT\t_\t_\t_\t_\t_\tSpaceAfter=No
8\tbri\t_\tVERB\t_\t_\t_\t_\t_\t_

# sent_id = quay-2
1\tEsko\t_\tVERB\t_\t_\t_\t_\t_\tSpaceAfter=No
2\tma\t_\tVERB\t_\t_\t_\t_\t_\tSpaceAfter=No
3\tnu\t_\tVERB\t_\t_\t_\t_\t_\t_
4\tsel\t_\tNOUN\t_\t_\t_\t_\t_\t_

"""


def test_written_words_and_their_morphs_from_a_small_conllu(tmp_path):
    path = tmp_path / "quay.conllu"
    path.write_text(TOKENIZED, encoding="utf-8")
    words = read_written_words(path)
    # Expected by hand (the comment above).
    assert words.morphs == [["orrin"], ["ve", "lo"], ["marra", "tund"], ["kal"], ["bri"],
                            ["esko", "ma", "nu"], ["sel"]]
    assert words.split == [["ve", "lo"], ["marra", "tund"], ["esko", "ma", "nu"]]
    assert words.sentences == 2 and words.skipped == 0
    assert words.types() == ["orrin", "velo", "marratund", "kal", "bri", "eskomanu", "sel"]


def test_a_sentence_without_joins_has_one_word_per_token():
    assert orthographic_words([(["A", "b"], None), (["c", "D"], [False, True])]) == \
        [["a"], ["b"], ["c", "d"]]


def test_baselines_on_the_small_conllu(tmp_path):
    path = tmp_path / "quay.conllu"
    path.write_text(TOKENIZED, encoding="utf-8")
    split = read_written_words(path).split
    scores = baseline_scores(split)
    # By hand: 4 gold boundaries. No split predicts none: P = R = F1 = 0 (the convention of
    # evaluation.segmentation). Every character: velo 3 positions, marratund 8, eskomanu 7,
    # so 18 predicted, all 4 gold among them: P = 4/18, R = 1, F1 = 2PR/(P+R) = 8/22.
    none, every = scores["no split"].boundaries, scores["every character"].boundaries
    assert (none.correct, none.predicted, none.gold, none.f1) == (0, 0, 4, 0.0)
    assert (every.correct, every.predicted, every.gold) == (4, 18, 4)
    assert every.precision == pytest.approx(4 / 18) and every.recall == 1.0
    assert every.f1 == pytest.approx(8 / 22)


@pytest.fixture(scope="module")
def web():
    return read_written_words(TREEBANK / "web.conllu")


def test_split_words_of_the_turkish_web_treebank_match_a_plain_count(web):
    # Independent count straight from the file's lines: within a sentence, a run of word lines
    # (PUNCT lines left out, which also end a run) joined by SpaceAfter=No on the line before
    # is one written word; runs of two or more are split words. The treebank has no multiword-
    # token ranges (checked here too), so SpaceAfter=No carries every join.
    split = boundaries = 0
    run, glue = 0, False
    for line in (TREEBANK / "web.conllu").read_text(encoding="utf-8").splitlines() + [""]:
        cols = line.split("\t")
        if line.startswith("#"):
            continue
        if len(cols) < 10 or cols[3] == "PUNCT":
            split += run >= 2
            boundaries += max(run - 1, 0)
            run, glue = 0, False
            continue
        assert "-" not in cols[0] and "." not in cols[0]
        if glue:
            run += 1
        else:
            split += run >= 2
            boundaries += max(run - 1, 0)
            run = 1
        glue = "SpaceAfter=No" in cols[9]
    assert len(web.split) == split
    assert sum(len(m) - 1 for m in web.split) == boundaries
    assert split > 4000 and web.skipped == 0


def test_turkish_baselines_every_character_has_full_recall(web):
    scores = baseline_scores(web.split)
    every = scores["every character"].boundaries
    # Every inner position of a split word is predicted (its length minus one, summed), and
    # every gold boundary is one of them. Length in characters, not code points: a combining
    # mark (the dot that lowercasing leaves on a dotted capital I, U+0307) is part of the
    # letter before it (Unicode Standard Annex #29), and nothing cuts between them.
    def length(word: str) -> int:
        return sum(not unicodedata.category(c).startswith("M") for c in word)
    assert every.predicted == sum(length("".join(m)) - 1 for m in web.split)
    assert sum(len("".join(m)) - length("".join(m)) for m in web.split) > 0   # such marks occur
    assert every.recall == 1.0 and every.correct == every.gold
    assert scores["no split"].boundaries.f1 == 0.0


def test_morph_grammar_base_probabilities_by_hand_and_by_enumeration():
    # Worked by hand for "ab" over the alphabet {a, b} with every odd 0.5 (end = grow = stop =
    # go = 0.5, each character 1/2): a bare stem, ROOT -> Stem -> Char Chars, has
    # 0.5 * (0.5 * 1/2) * (0.5 * 1/2) = 1/32; a stem and one suffix, ROOT -> Word -> Stem
    # Suffix, has 0.5 * 0.5 * (0.5 * 1/2) * (0.5 * 1/2) = 1/64. Total 3/64; the brute-force
    # enumeration of every tree (tests/_brute.py) must find the same two trees.
    grammar = morph_grammar("ab")
    trees = list(all_trees(grammar, ["a", "b"]))
    assert len(trees) == 2
    assert sum(math.exp(lp) for lp, _, _ in trees) == pytest.approx(3 / 64)
    assert set(grammar.adapted) == {"Stem", "Suffix"}


def test_submorph_grammar_base_probabilities_by_hand_and_by_enumeration():
    # Worked by hand for "ab" over {a, b}, every odd 0.5 and each character 1/2, with the
    # SubMorph level (a stem or suffix spelled out with probability 1/2, built of submorphs
    # with 1/2). A stem "ab" spelled out: 1/2 * (0.5 * 1/2) * (0.5 * 1/2) = 1/32; built of two
    # one-character submorphs: 1/2 * 0.5 * (0.5 * 1/2)^2 = 1/64. A one-character stem or
    # suffix: 1/2 * 0.5 * 1/2 = 1/8. So ROOT -> Stem: 0.5 * (1/32 + 1/64) = 3/128, and ROOT ->
    # Word -> Stem Suffix: 0.5 * 0.5 * 1/8 * 1/8 = 1/256; three trees, 7/256 in all, which the
    # brute-force enumeration of every tree (tests/_brute.py) must find.
    grammar = morph_grammar("ab", submorphs=True)
    trees = list(all_trees(grammar, ["a", "b"]))
    assert len(trees) == 3
    assert sum(math.exp(lp) for lp, _, _ in trees) == pytest.approx(7 / 256)
    assert set(grammar.adapted) == {"Stem", "Suffix", "SubMorph"}
    # Without the level the grammar is the plain one, rule for rule.
    assert morph_grammar("abc", submorphs=False).to_text() == morph_grammar("abc").to_text()


def test_prefix_grammar_base_probabilities_by_hand_and_by_enumeration():
    # Worked by hand for "ab" over {a, b}, every odd 0.5 and each character 1/2, with
    # prefixes (no prefix 1/2, then a bare stem or a stem with suffixes, 1/2 each). A bare
    # stem "ab": 1/4 * (0.5 * 1/2 * 0.5 * 1/2) = 1/64; a stem "a" and a suffix "b", ROOT ->
    # Word -> Stem Suffix: 1/4 * 1/2 * 1/4 * 1/4 = 1/128; a prefix "a" before a bare stem
    # "b", ROOT -> Prefixed -> Prefix Stem: 1/2 * 1/4 * 1/4 * 1/4 = 1/128. Three trees, 1/32
    # in all, which the brute-force enumeration of every tree (tests/_brute.py) must find.
    grammar = morph_grammar("ab", prefixes=True)
    trees = list(all_trees(grammar, ["a", "b"]))
    assert len(trees) == 3
    assert sum(math.exp(lp) for lp, _, _ in trees) == pytest.approx(1 / 32)
    assert set(grammar.adapted) == {"Prefix", "Stem", "Suffix"}
    assert morph_units(grammar.symbols) == ("Prefix", "Stem", "Suffix")
    assert morph_units(morph_grammar("ab").symbols) == ("Stem", "Suffix")
    # With submorphs, a prefix may be built of them as a suffix may.
    both = morph_grammar("ab", prefixes=True, submorphs=True).to_text()
    assert "Prefix -> SubMorph SubMorph" in both and "Suffix -> SubMorph SubMorph" in both
    assert morph_grammar("abc", prefixes=False).to_text() == morph_grammar("abc").to_text()


def test_prefixes_recover_an_invented_prefixing_language():
    # Recovery test (invented data, where the generating process gives the truth): 400 words
    # of the prefixing variety of scripts/make_affix_language.py (seed 1), 2 chains of 30
    # sweeps, the last 5 sweeps pooled by majority. With prefixes the grammar finds the
    # front boundaries (boundary F1 0.917 when measured); without them it can only call a
    # prefix a stem and the stem a suffix, and misses about a third of the boundaries
    # (0.721). The margins below leave room for nothing but a real change in the sampler.
    sys.path.insert(0, str(REPO / "scripts"))
    try:
        from make_affix_language import affix_language
    finally:
        sys.path.remove(str(REPO / "scripts"))
    gold = [w.split() for w in affix_language("prefixes", 400, seed=1)]
    chars = [characters("".join(g)) for g in gold]
    f1 = {}
    for prefixes in (False, True):
        grammar = morph_grammar([c for w in chars for c in w], submorphs=True,
                                prefixes=prefixes)
        sampler = AdaptorSampler(grammar, chars, chains=2, seed=0)
        tally = BoundaryTally.of(sampler)
        for sweep in range(30):
            sampler.run(1)
            if sweep >= 25:
                tally.record(sampler, morph_units(sampler.rules.names))
        f1[prefixes] = evaluate_segmentation(tally.segmentations(chars),
                                             gold).boundaries.f1
    assert f1[True] > 0.85 and f1[True] - f1[False] > 0.1


def test_prefix_edges_are_cuts():
    grammar = morph_grammar("abc", prefixes=True)
    names = grammar.symbols
    prefix, stem, suffix, word, prefixed = (names.index(s) for s in (
        "Prefix", "Stem", "Suffix", "Word", "Prefixed"))
    char, chars = names.index("Char"), names.index("Chars")
    a, b, c = (grammar.vocab.encode([x])[0] for x in "abc")
    # "cabc" as Prefix(c) Word(Stem(ab) Suffix(c)): cuts after 1 and 3 (by hand).
    tree = (prefixed, (prefix, c), (word, (stem, (char, a), (chars, b)), (suffix, c)))
    units = [names.index(u) for u in morph_units(names)]
    assert units == [prefix, stem, suffix]
    assert morph_cuts(tree, units, list("cabc")) == ["c", "ab", "c"]


def test_submorph_edges_are_not_cuts():
    grammar = morph_grammar("abc", submorphs=True)
    names = grammar.symbols
    stem, suffix, sub, word = (names.index(s) for s in ("Stem", "Suffix", "SubMorph", "Word"))
    a, b, c = (grammar.vocab.encode([x])[0] for x in "abc")
    # "abc" as Stem(SubMorph(a) SubMorph(b)) Suffix(c): one cut, after 2 (by hand).
    tree = (word, (stem, (sub, a), (sub, b)), (suffix, c))
    assert morph_cuts(tree, [stem, suffix], list("abc")) == ["ab", "c"]


def test_morph_cuts_union_the_edges_of_stems_and_suffixes():
    grammar = morph_grammar("abc")
    names = grammar.symbols
    stem, suffix, char, chars = (names.index(s) for s in ("Stem", "Suffix", "Char", "Chars"))
    word, suffixes = names.index("Word"), names.index("Suffixes")
    a, b, c = (grammar.vocab.encode([x])[0] for x in "abc")
    # "abcab" as Stem(ab) Suffix(c) Suffix(ab): cuts after 2 and 3 (by hand).
    ab_stem = (stem, (char, a), (chars, b))
    ab_suffix = (suffix, (char, a), (chars, b))
    tree = (word, ab_stem, (suffixes, (suffix, c), ab_suffix))
    assert morph_cuts(tree, [stem, suffix], list("abcab")) == ["ab", "c", "ab"]
    assert morph_cuts(tree, [stem], list("abcab")) == ["ab", "cab"]


def quay_config(folder: Path, sweeps: int) -> Path:
    """A morph segmentation config over TOKENIZED, written into `folder` with it."""
    path = folder / "quay.conllu"
    path.write_text(TOKENIZED, encoding="utf-8")
    config = folder / "morphs.yaml"
    config.write_text(f"data:\n  text: {path}\n  format: conllu\ngrammar:\n  unit: morphs\n"
                      f"sampler:\n  sweeps: {sweeps}\noutput:\n  stdout_metrics: false\n",
                      encoding="utf-8")
    return config


def test_segment_job_in_morph_mode_writes_types_lexicon_and_split_word_scores(tmp_path):
    config = quay_config(tmp_path, 3)
    out = io.StringIO()
    result = segment_words(load_segment_config(config), tmp_path / "run", stream=out)
    lines = result.segmentation.read_text(encoding="utf-8").splitlines()
    # One line per distinct written word, in order of first occurrence (the comment above).
    assert ["".join(line.split()) for line in lines] == \
        ["orrin", "velo", "marratund", "kal", "bri", "eskomanu", "sel"]
    lexicon = [line.split("\t") for line in
               result.lexicon.read_text(encoding="utf-8").splitlines()]
    assert {row[0] for row in lexicon} <= {"Prefix", "Stem", "Suffix", "SubMorph"}
    # Every word has exactly one stem: the Stem customers add up to the 7 words.
    assert sum(int(row[2]) for row in lexicon if row[0] == "Stem") == 7
    metrics = [json.loads(line) for line in
               (tmp_path / "run" / "metrics.jsonl").read_text(encoding="utf-8").splitlines()]
    assert {"cached_Prefix", "cached_Stem", "cached_Suffix", "cached_SubMorph",
            "discount_Suffix", "boundary_f1"} <= set(metrics[-1])
    assert "on the 3 split written words: boundary precision" in out.getvalue()
    assert "every character: precision 0.222" in out.getvalue()  # 4/18, worked out above


def test_conllu_input_needs_the_morph_grammar(tmp_path):
    config = tmp_path / "bad.yaml"
    config.write_text("data:\n  text: x.conllu\n  format: conllu\n", encoding="utf-8")
    with pytest.raises(ConfigError) as caught:
        load_segment_config(config)
    assert "data.format" in str(caught.value)


def test_morph_mode_resumes_bit_for_bit(tmp_path, monkeypatch):
    # Reference: the uninterrupted run of the same config (as tests/test_adaptor_run.py does
    # for words), here with CoNLL-U input and both Stem and Suffix hyperparameters resampled.
    path = tmp_path / "quay.conllu"
    path.write_text(TOKENIZED, encoding="utf-8")
    config = tmp_path / "morphs.yaml"
    config.write_text(f"data:\n  text: {path}\n  format: conllu\ngrammar:\n  unit: morphs\n"
                      f"sampler:\n  sweeps: 6\n  checkpoint_every: 2\n  "
                      f"resample_hyperparameters: true\noutput:\n  stdout_metrics: false\n",
                      encoding="utf-8")
    segment_words(load_segment_config(config), tmp_path / "straight")
    _stopped_in_sweep(4, config, tmp_path / "halves", monkeypatch)
    segment_resume(tmp_path / "halves")
    for name in ("segmentation.txt", "lexicon.tsv"):
        assert (tmp_path / "halves" / name).read_text() == \
            (tmp_path / "straight" / name).read_text(), name
    ends = [json.loads((tmp_path / run / "chains.json").read_text())["chains"]
            for run in ("halves", "straight")]
    assert ends[0] == ends[1]


@pytest.mark.parametrize("key, symbol", [("submorphs", "SubMorph"), ("prefixes", "Prefix")])
def test_a_run_without_a_level_and_an_older_run_without_it_resumes(tmp_path, monkeypatch, key,
                                                                    symbol):
    # Reference: the uninterrupted run without the level (SubMorph, or Prefix). A run folder
    # written before grammar.submorphs or grammar.prefixes existed has no such key in its
    # config.yaml (so it reads as the default, true), while its checkpoint holds the grammar
    # without it; the resume must sample and report that grammar.
    config = quay_config(tmp_path, 4)
    text = config.read_text(encoding="utf-8")
    config.write_text(text.replace("  unit: morphs\n", f"  unit: morphs\n  {key}: false\n")
                      .replace("  sweeps: 4\n", "  sweeps: 4\n  checkpoint_every: 2\n"),
                      encoding="utf-8")
    straight = segment_words(load_segment_config(config), tmp_path / "straight")
    lexicon = straight.lexicon.read_text(encoding="utf-8")
    assert f"{symbol}\t" not in lexicon and "Stem\t" in lexicon
    metrics = (tmp_path / "straight" / "metrics.jsonl").read_text(encoding="utf-8")
    assert "cached_Stem" in metrics and f"cached_{symbol}" not in metrics
    _stopped_in_sweep(3, config, tmp_path / "old", monkeypatch)
    saved = tmp_path / "old" / "config.yaml"
    lines = saved.read_text(encoding="utf-8").splitlines(keepends=True)
    assert sum(f"{key}: false" in line for line in lines) == 1
    saved.write_text("".join(x for x in lines if f"{key}:" not in x), encoding="utf-8")
    segment_resume(tmp_path / "old")
    for name in ("segmentation.txt", "lexicon.tsv"):
        assert (tmp_path / "old" / name).read_text() == \
            (tmp_path / "straight" / name).read_text(), name
    ends = [json.loads((tmp_path / run / "chains.json").read_text())["chains"]
            for run in ("old", "straight")]
    assert ends[0] == ends[1]


def test_morph_mode_on_lines_takes_one_word_per_line_with_spaces_as_gold(tmp_path):
    text = tmp_path / "words.txt"
    text.write_text("ve lo\nmarra tund\n\nsel\n", encoding="utf-8")
    config = tmp_path / "morphs.yaml"
    config.write_text(f"data:\n  text: {text}\ngrammar:\n  unit: morphs\nsampler:\n  sweeps: 2\n"
                      f"output:\n  stdout_metrics: false\n", encoding="utf-8")
    result = segment_words(load_segment_config(config), tmp_path / "run")
    lines = result.segmentation.read_text(encoding="utf-8").splitlines()
    assert ["".join(line.split()) for line in lines] == ["velo", "marratund", "sel"]
    # Two gold boundaries (after "ve" and after "marra"), counted by hand.
    assert result.scores.boundaries.gold == 2


def test_a_run_with_prefixes_cuts_and_reports_them(tmp_path):
    text = tmp_path / "words.txt"
    text.write_text("ri vol\nri tand\nso vol\nvol an\nso tand an\n", encoding="utf-8")
    config = tmp_path / "morphs.yaml"
    config.write_text(f"data:\n  text: {text}\ngrammar:\n  unit: morphs\n  prefixes: true\n"
                      f"sampler:\n  sweeps: 3\n  samples: 0\noutput:\n  stdout_metrics: false\n",
                      encoding="utf-8")
    result = segment_words(load_segment_config(config), tmp_path / "run")
    metrics = [json.loads(line) for line in
               (tmp_path / "run/metrics.jsonl").read_text().splitlines()]
    assert all({"cached_Prefix", "cached_Stem", "cached_Suffix"} <= set(m) for m in metrics)
    symbols = {line.split("\t")[0] for line in
               result.lexicon.read_text(encoding="utf-8").splitlines()}
    assert symbols <= {"Prefix", "Stem", "Suffix", "SubMorph"} and "Stem" in symbols
    # Every cut of the written segmentation is a top-most Prefix, Stem or Suffix edge of the
    # last state, recounted here from the checkpoint's trees.
    state = json.loads((tmp_path / "run/chains.json").read_text(encoding="utf-8"))
    sampler = AdaptorSampler.from_state(state["chains"])
    names = sampler.rules.names
    units = [names.index(u) for u in ("Prefix", "Stem", "Suffix")]
    expected = [" ".join(morph_cuts(tree, units, chars))
                for tree, chars in zip(sampler.trees(0), sampler.words)]
    assert result.segmentation.read_text(encoding="utf-8").splitlines() == expected


def test_turkic_case_rules_lower_both_capital_is_to_their_own_small_letters():
    # Fact of the trade (Unicode SpecialCasing.txt, Turkish and Azerbaijani): I lowers to
    # dotless i (U+0131) and dotted capital I (U+0130) to i; the language-independent mapping
    # gives i and i + combining dot above (U+0307). Invented words; gold morphs lowered alike.
    sentences = [(["Irmak", "\u0130lu", "da"], [False, False, True]), (["Ivet"], None)]
    assert orthographic_words(sentences, "turkic") == \
        [["\u0131rmak"], ["ilu", "da"], ["\u0131vet"]]
    assert orthographic_words(sentences) == [["irmak"], ["i\u0307lu", "da"], ["ivet"]]


# Invented text with contractions. Worked out by hand from the CoNLL-U rule that a multiword
# token's FORM is the word as written and its words are the syntactic words: "dulo" is
# written for de + ulo (the "e" dropped), so its tokens run together ("deulo") do not spell
# it; "Karrin" over kar + rin is spelled by them (case aside); "zomi" joins the contraction
# "zo" (za + o) to "mi" by SpaceAfter=No, so the written word holds a contraction too.
CONTRACTED = """\
# sent_id = mill-1
1-2\tdulo\t_\t_\t_\t_\t_\t_\t_\t_
1\tde\t_\tADP\t_\t_\t_\t_\t_\t_
2\tulo\t_\tNOUN\t_\t_\t_\t_\t_\t_
3-4\tKarrin\t_\t_\t_\t_\t_\t_\t_\t_
3\tkar\t_\tNOUN\t_\t_\t_\t_\t_\t_
4\trin\t_\tDET\t_\t_\t_\t_\t_\t_
5-6\tzo\t_\t_\t_\t_\t_\t_\t_\tSpaceAfter=No
5\tza\t_\tADP\t_\t_\t_\t_\t_\t_
6\to\t_\tDET\t_\t_\t_\t_\t_\t_
7\tmi\t_\tNOUN\t_\t_\t_\t_\t_\t_
8\tsel\t_\tVERB\t_\t_\t_\t_\t_\t_

"""


def test_contracted_multiword_tokens_are_set_aside_not_run_together(tmp_path):
    path = tmp_path / "mill.conllu"
    path.write_text(CONTRACTED, encoding="utf-8")
    words = read_written_words(path)
    # By hand (the comment above): "deulo" and "zaomi" were never written.
    assert words.morphs == [["kar", "rin"], ["sel"]]
    assert words.types() == ["karrin", "sel"]
    assert words.contracted == [("dulo", ["de", "ulo"]), ("zomi", ["za", "o", "mi"])]


def test_a_segment_run_says_which_contractions_it_set_aside(tmp_path):
    path = tmp_path / "mill.conllu"
    path.write_text(CONTRACTED, encoding="utf-8")
    config = tmp_path / "morphs.yaml"
    config.write_text(f"data:\n  text: {path}\n  format: conllu\ngrammar:\n  unit: morphs\n"
                      f"sampler:\n  sweeps: 2\noutput:\n  stdout_metrics: false\n",
                      encoding="utf-8")
    result = segment_words(load_segment_config(config), tmp_path / "run")
    lines = result.segmentation.read_text(encoding="utf-8").splitlines()
    assert ["".join(line.split()) for line in lines] == ["karrin", "sel"]
    log = (tmp_path / "run" / "segment.log").read_text(encoding="utf-8")
    assert "set aside 2 written words (2 distinct) that are contractions" in log
    assert "'dulo' as de + ulo" in log
    # One gold boundary (after "kar"), counted by hand.
    assert result.scores.boundaries.gold == 1
