"""The pieces of scripts/bench_induction.py on tiny data: punctuation removal against the
treebank's own dependency heads, the lean statistic, the split, and a smoke run whose baseline
row is recomputed by brute force."""

from __future__ import annotations

import importlib.util
import json
import math
import sys
import sysconfig
from pathlib import Path

import conllu
import pytest
import torch

from treewright.evaluation import Bracketing, left_branching, right_branching

REPO = Path(__file__).resolve().parents[1]
# The script imports its sibling scripts (make_headed_language, make_demo_data) as it does when
# run: from its own folder on the path.
sys.path.insert(0, str(REPO / "scripts"))
_spec = importlib.util.spec_from_file_location("bench_induction",
                                               REPO / "scripts" / "bench_induction.py")
bench = importlib.util.module_from_spec(_spec)
sys.modules["bench_induction"] = bench   # dataclasses look their module up while building
_spec.loader.exec_module(bench)

WEB = Path(sysconfig.get_paths()["purelib"]) / "data" / "web.conllu"
needs_treebank = pytest.mark.skipif(not WEB.exists(), reason="turkish-treebanks not installed")


def _yields_without_punct(tokenlist) -> tuple[list[str], set[tuple[int, int]]] | None:
    """Brute force from the raw heads (read by the `conllu` library, the reference): every
    word's subtree yield, punctuation words removed, as spans of width >= 2 over the kept words;
    None for a non-projective sentence (a yield with a gap)."""
    words = [t for t in tokenlist if isinstance(t["id"], int)]
    heads = {t["id"]: t["head"] for t in words}
    kept = [t["id"] for t in words if t["upos"] != "PUNCT"]
    position = {word_id: k for k, word_id in enumerate(kept)}
    spans = set()
    for t in words:
        below = {t["id"]}
        for other in heads:           # walk each word up to the root: is t an ancestor?
            node = other
            while node != 0:
                if node == t["id"]:
                    below.add(other)
                    break
                node = heads[node]
        if max(below) - min(below) + 1 != len(below):
            return None
        inside = [position[i] for i in sorted(below) if i in position]
        if len(inside) >= 2:
            spans.add((inside[0], inside[-1] + 1))
    n = len(kept)
    if n >= 2:
        spans.add((0, n))             # the reader adds a whole-sentence phrase when needed
    return [t["form"].lower() for t in words if t["upos"] != "PUNCT"], spans


@needs_treebank
def test_punctuation_removal_matches_dependency_yields():
    # Reference: the conllu library's parse of the same file and a brute-force descendant walk.
    tokens, gold, counts, written = bench.read_treebank(WEB, "tokens", sentences=60)
    with open(WEB, encoding="utf-8") as handle:
        reference = [s for _, s in zip(range(60), conllu.parse_incr(handle))]
    checked = 0
    for toks, g, ref, w in zip(tokens, gold, reference, written):
        # What the trainer reads: the same words, joined where the word before them is kept
        # and says SpaceAfter=No in the conllu library's parse (this treebank has no ranges).
        words_ref = [t for t in ref if isinstance(t["id"], int)]
        kept = [t["upos"] != "PUNCT" for t in words_ref]
        glue = [False] + [(t["misc"] or {}).get("SpaceAfter") == "No" for t in words_ref[:-1]]
        assert w.words == toks
        assert w.joined == [g_ and i > 0 and kept[i - 1] for i, g_ in enumerate(glue) if kept[i]]
        expected = _yields_without_punct(ref)
        if expected is None:
            continue
        words, spans = expected
        assert toks == [bench.clean_token(w) for w in words]
        assert {(i, j) for i, j in g.unlabeled() if j - i >= 2} == spans
        checked += 1
    assert checked >= 50
    assert counts["used"] == 60


@needs_treebank
def test_the_corpus_reader_drops_tagged_words_like_the_dependency_yields():
    # The training option data.drop_tags (ReadOptions.punct_labels on CoNLL-U). Reference: the
    # conllu library's parse and the brute-force descendant walk above.
    from treewright.corpus import ReadOptions, read_corpus
    corpus = read_corpus(WEB, "conllu", ReadOptions(punct_labels=frozenset({"PUNCT"}),
                                                     lowercase=True))
    with open(WEB, encoding="utf-8") as handle:
        reference = [s for _, s in zip(range(80), conllu.parse_incr(handle))]
    checked = 0
    for ref in reference:
        expected = _yields_without_punct(ref)
        if expected is None:
            continue
        words, spans = expected
        # The reader skips non-projective sentences, so match by tokens, not by position.
        matches = [s for s in corpus.sentences[:120] if s.tokens == words]
        assert matches, words
        got = Bracketing.from_tree(matches[0].tree)
        assert {(i, j) for i, j in got.unlabeled() if j - i >= 2} == spans
        assert "PUNCT" not in matches[0].tags
        checked += 1
    assert checked >= 70


@needs_treebank
def test_tag_mode_reads_upos_without_punct():
    tokens, gold, _, written = bench.read_treebank(WEB, "tags", sentences=20)
    with open(WEB, encoding="utf-8") as handle:
        reference = [s for _, s in zip(range(20), conllu.parse_incr(handle))]
    for toks, ref in zip(tokens, reference):
        # Reference: the UPOS column read by the conllu library, PUNCT dropped.
        assert toks == [t["upos"] for t in ref if isinstance(t["id"], int)
                        and t["upos"] != "PUNCT"]
        assert "PUNCT" not in toks
    assert [w.tags for w in written] == tokens      # the tags the trainer reads in tag mode


def test_lean_of_branching_trees():
    # Fact of the definitions: every non-whole span of a left-branching tree starts at word 0,
    # every one of a right-branching tree ends at the last word.
    words = tuple("abcdef")
    left = Bracketing.from_spans(words, left_branching(6))
    right = Bracketing.from_spans(words, right_branching(6))
    assert bench.lean([left], [left]) == {"left_share": 1.0, "right_share": 0.0}
    assert bench.lean([right], [right]) == {"left_share": 0.0, "right_share": 1.0}
    # Brute force on a hand-made tree: spans (0,2), (2,5), (3,5) of 5 words -> 1 left, 1 right.
    mixed = Bracketing.from_spans(tuple("abcde"), [(0, 5), (0, 2), (2, 5), (3, 5)])
    assert bench.lean([mixed], [mixed]) == {"left_share": 1 / 3, "right_share": 2 / 3}


def test_lean_ignores_gold_punctuation():
    # The final '.' (tagged PUNCT in gold) is dropped first, so (0, 3) becomes the whole sentence
    # and is not counted; (1, 3) then ends at the last word.
    words = ("a", "b", "c", ".")
    gold = Bracketing.from_spans(words, [(0, 4), (0, 3)], tags=("N", "V", "N", "PUNCT"))
    pred = Bracketing.from_spans(words, [(0, 4), (0, 3), (1, 3)])
    assert bench.lean([pred], [gold]) == {"left_share": 0.0, "right_share": 1.0}


def test_without_punctuation_remaps_spans():
    # Brute force by hand: "x , y z" with spans (0,4), (2,4); dropping "," gives (0,3), (1,3).
    gold = Bracketing.from_spans(("x", ",", "y", "z"), [(0, 4), (2, 4)],
                                 tags=("N", "PUNCT", "N", "V"))
    tokens, kept = bench.without_punctuation(gold, list(gold.tags), ["x", ",", "y z", "w"])
    assert tokens == ["x", "y_z", "w"]
    assert kept.unlabeled() == {(0, 3), (1, 3)}
    assert kept.tags == ("N", "N", "V")


def _brute_sentence_f1(pred_spans, gold_spans):
    """Mean per-sentence F1 over sentences with any counted span (common practice: whole span
    and single words excluded, empty sentences skipped)."""
    scores = []
    for p, g in zip(pred_spans, gold_spans):
        if not p and not g:
            continue
        scores.append(2 * len(p & g) / (len(p) + len(g)))
    return sum(scores) / len(scores)


def test_smoke_run_writes_results(tmp_path):
    result = bench.main(["--smoke", "--methods", "em", "--out", str(tmp_path)])
    saved = json.loads((tmp_path / "results.json").read_text())
    assert saved["summary"]["em"]["demo-test"]["seeds"] == [0]
    assert "| em |" in saved["tables"]["demo-test"]
    # The right-branching row recomputed by brute force from the demo test trees.
    from treewright.corpus import read_corpus
    from treewright.demo import demo_data_dir
    golds, preds = [], []
    for s in read_corpus(demo_data_dir() / "test.trees", "brackets").sentences:
        b = Bracketing.from_tree(s.tree)
        drop = [i for i, t in enumerate(b.tags) if t == "PUNCT"]
        b = b.remove_words(drop)
        n = len(b.words)
        if n > 8:                     # --smoke scores sentences of at most 8 words
            continue
        golds.append({(i, j) for i, j in b.unlabeled() if j - i >= 2 and (i, j) != (0, n)})
        preds.append({(i, j) for i, j in right_branching(n) if (i, j) != (0, n)})
    reported = result["baselines"]["demo-test"]["right_branching"]["sentence_f1"]
    assert reported == pytest.approx(_brute_sentence_f1(preds, golds))
    # The generating grammar must parse every scored test sentence (it generated them).
    assert result["ceiling"]["demo-test"]["unparsed"] == 0


def test_smoke_run_of_the_lowrank_row(tmp_path):
    result = bench.main(["--smoke", "--methods", "lowrank", "--lowrank-symbols", "5,8",
                         "--override", "model.rank=6", "--out", str(tmp_path)])
    saved = json.loads((tmp_path / "results.json").read_text())
    assert saved["lowrank_symbols"] == [5, 8]
    e = result["summary"]["lowrank"]["demo-test"]
    assert 0.0 <= e["sentence_f1"][0] <= 100.0
    assert "| lowrank |" in saved["tables"]["demo-test"]
    assert "not run" not in saved["tables"]["demo-test"]


def test_smoke_run_of_the_compound_row(tmp_path):
    result = bench.main(["--smoke", "--methods", "compound", "--override", "model.latent_dim=4",
                         "--override", "model.embedding_dim=16", "--out", str(tmp_path)])
    e = result["summary"]["compound"]["demo-test"]
    assert 0.0 <= e["sentence_f1"][0] <= 100.0
    run = result["runs"][0]["scores"]["demo-test"]
    # Every scored sentence is parsed: the demo's unknown-word token covers unseen words.
    assert run["unparsed"] == 0 and math.isfinite(run["perplexity"])


def test_independent_row_scores_its_model_as_the_dense_grammar_would():
    # Reference: the dense engine's MBR spans and log p(sentence) (`mbr_and_likelihood`, checked
    # against the library's decoder below) on the model's own rules written out densely, so the
    # independent engine pass the row uses must give the same trees and likelihoods.
    from types import SimpleNamespace
    from treewright.params import IndependentParams, symbol_names
    from treewright.vocab import Vocabulary
    vocab = Vocabulary(["<unk>", "sa", "tev", "orim", "lu"], unk="<unk>")
    model = IndependentParams(3, 4, len(vocab), 2.0, torch.Generator().manual_seed(5),
                              torch.float64)
    sentences = [["sa", "tev"], ["orim", "sa", "lu", "tev"], ["lu", "lu", "sa", "orim", "tev"],
                 ["tev", "zzz", "sa"], ["sa"]]
    trainer = SimpleNamespace(model=model, data=SimpleNamespace(vocab=vocab),
                              dtype=torch.float64)
    spans, logprobs = bench.model_mbr_and_likelihood(trainer, sentences, batch_size=2)
    grammar = model.to_grammar(*symbol_names(3, 4), vocab)
    want_spans, want_logprobs = bench.mbr_and_likelihood(grammar, sentences, batch_size=2)
    for got, want, lp, want_lp in zip(spans, want_spans, logprobs, want_logprobs):
        assert (got is None) == (want is None)
        if got is not None:
            assert sorted(got) == sorted(want)
        assert lp == pytest.approx(want_lp, abs=1e-9)
    assert spans[-1] is None and logprobs[-1] == float("-inf")   # one word: no nonterminal
    assert all(s is not None for s in spans[:-1])


def test_smoke_run_of_the_independent_row(tmp_path):
    result = bench.main(["--smoke", "--methods", "independent", "--independent-symbols", "4,6",
                         "--out", str(tmp_path)])
    saved = json.loads((tmp_path / "results.json").read_text())
    assert saved["independent_symbols"] == [4, 6]
    assert result["runs"][0]["overrides"][6:8] == ["model.nonterminals=4",
                                                   "model.preterminals=6"]
    e = result["summary"]["independent"]["demo-test"]
    assert 0.0 <= e["sentence_f1"][0] <= 100.0
    assert "| independent |" in saved["tables"]["demo-test"]


def test_fast_scoring_matches_library_decode():
    # Reference: the library's own MBR decoder and inside scores on the demo generating grammar.
    from treewright.corpus import read_corpus
    from treewright.decode import decode
    from treewright.demo import demo_data_dir
    from treewright.grammar import load_grammar
    from treewright.inference import score
    grammar = load_grammar(demo_data_dir() / "grammar.pcfg")
    sentences = [list(s.tokens) for s in
                 read_corpus(demo_data_dir() / "test.trees", "brackets").sentences[:12]]
    sentences.append(["no-such-word", "."])            # unparsable: no unknown-word rule
    spans, logprobs = bench.mbr_and_likelihood(grammar, sentences, batch_size=5)
    for words, got, lp, d, ref in zip(sentences, spans, logprobs, decode(grammar, sentences),
                                      score(grammar, sentences, dtype=torch.float64)):
        if d.tree is None:
            assert got is None and lp == float("-inf") and not ref.parsed
            continue
        n = len(words)
        want = {(i, j) for i, j in Bracketing.from_tree(d.tree).unlabeled() if j - i >= 2}
        assert set(got) == want and len(got) == max(n - 1, 0)
        assert lp == pytest.approx(ref.logprob, abs=1e-9)
    assert spans[-1] is None


@pytest.mark.parametrize("side", ["first", "last"])
@pytest.mark.parametrize("dense", [True, False], ids=["dense", "sparse"])
def test_fast_scoring_under_the_word_piece_constraint_matches_library_decode(side, dense):
    # Reference: the library's mbr decoder under the same constraint (checked against
    # enumeration in test_decode.py) for the trees, and the unconstrained inside scores for
    # log p(sentence): the benchmark's perplexity stays the model's own. On a grammar with
    # every rule (as induction's are) the constraint always leaves trees; the demo's sparse
    # generating grammar it leaves some sentences none, and those are decoded without it, as
    # `parse` does.
    import random

    from _grammars import random_grammar
    from treewright.corpus import read_corpus
    from treewright.decode import decode
    from treewright.demo import demo_data_dir
    from treewright.grammar import load_grammar
    from treewright.inference import score
    if dense:
        grammar = random_grammar(4, 5, 6, seed=3)
        draw = random.Random(3)
        sentences = [[f"w{draw.randrange(6)}" for _ in range(draw.randint(2, 9))]
                     for _ in range(14)]
    else:
        grammar = load_grammar(demo_data_dir() / "grammar.pcfg")
        sentences = [list(s.tokens) for s in
                     read_corpus(demo_data_dir() / "test.trees", "brackets").sentences[:12]]
    barred = [[k for k in range(1, len(s)) if (k + b) % 3 == 0] for b, s in enumerate(sentences)]
    barred[4] = []                                        # a batch may mix barred and free
    spans, logprobs = bench.mbr_and_likelihood(grammar, sentences, batch_size=5,
                                               pieces=(side, barred))
    decoded = decode(grammar, sentences, "mbr", pieces=(side, barred))
    free = bench.mbr_and_likelihood(grammar, sentences, batch_size=5)[0]
    changed = lost = 0
    for words, got, lp, d, ref, was in zip(sentences, spans, logprobs, decoded,
                                           score(grammar, sentences, dtype=torch.float64), free):
        if d.tree is None:
            lost += 1
            d = decode(grammar, [words], "mbr")[0]
        want = {(i, j) for i, j in Bracketing.from_tree(d.tree).unlabeled() if j - i >= 2}
        assert set(got) == want and len(got) == len(words) - 1
        assert lp == pytest.approx(ref.logprob, abs=1e-9)
        changed += set(was) != want
    assert (changed >= 3 and lost == 0) if dense else lost >= 1


def test_mirrored_grammar_gives_reversed_sentences_the_same_probability():
    # Reference: tests/_brute.py enumerates every tree of each sentence under both grammars.
    from _brute import all_trees, summary
    from treewright.demo import demo_data_dir
    from treewright.grammar import load_grammar
    from treewright.inference import generate
    original = load_grammar(demo_data_dir() / "grammar.pcfg")
    mirror = bench.mirror_grammar(original)
    short = [t.leaves() for t in generate(original, 400, seed=3, max_words=5)][:6]
    assert len(short) == 6 and min(map(len, short)) >= 4
    for words in short:
        forward = summary(original, words)["logz"]
        backward = list(reversed(words))
        assert summary(mirror, backward)["logz"] == pytest.approx(forward, abs=1e-9)
        # Not a symmetric grammar: the original cannot open a sentence with its final mark.
        assert not list(all_trees(original, backward))


def test_generated_orders_are_deterministic_and_parsed_by_their_grammar(tmp_path):
    first = bench.generated_data("head-initial", tmp_path, 30, 10, 40, seed=5)
    again = bench.generated_data("head-initial", tmp_path, 30, 10, 40, seed=5)
    assert first.train_tokens == again.train_tokens and first.dev_tokens == []
    test = first.evals[0]
    assert len(first.train_tokens) == 30 and len(test.tokens) == 10
    # head-initial: the mirror opens every sentence with its final mark (S -> PUNCT CL).
    assert all(s[0] in {".", "!"} for s in first.train_tokens)
    # Each gold tree is the generating tree: its words are the sentence, and the ceiling
    # grammar (written beside the data) gives every test sentence a finite probability
    # (reference: brute-force enumeration, tests/_brute.py, on the short ones).
    from _brute import summary
    from treewright.grammar import load_grammar
    ceiling = load_grammar(first.ceiling)
    for words, gold in zip(test.tokens, test.gold):
        assert list(gold.words) == words
        if len(words) <= 5:
            assert math.isfinite(summary(ceiling, words)["logz"])


def test_smoke_run_of_a_generated_order_scores_every_restart(tmp_path):
    result = bench.main(["--data", "head-final", "--train-sentences", "60", "--test-sentences",
                         "12", "--epochs", "1", "--restarts", "2", "--symbols", "4,6",
                         "--seeds", "0", "--out", str(tmp_path)])
    run = result["runs"][0]
    assert [r["restart"] for r in run["restarts"]] == [0, 1]
    kept = run["restarts"][run["best_restart"]]["scores"]["head-final-test"]
    # The kept restart's grammar is the run's grammar, so its scores are the run's.
    assert kept["model"] == run["scores"]["head-final-test"]["model"]
    assert not (tmp_path / "dev.txt").exists()
    # The consensus of the two restarts, recomputed by another route: each restart's MBR
    # trees from the engine's span posteriors (`mbr_and_likelihood`, checked against the
    # library decoder above) averaged by `decode.tree_average` (checked against brute force
    # in tests/test_study_restarts.py), scored by `evaluate_brackets`.
    from treewright.decode import tree_average
    from treewright.evaluation import BracketConventions, evaluate_brackets
    from treewright.grammar import load_grammar
    (tmp_path / "again").mkdir()
    data = bench.generated_data("head-final", tmp_path / "again", 60, 12, 15, seed=0)
    ev = data.evals[0]
    votes = [bench.mbr_and_likelihood(load_grammar(tmp_path / "em-seed0" / f"restart-{r}.pcfg",
                                                   tolerance=1e-4), ev.tokens)[0]
             for r in (0, 1)]
    averaged = [tree_average([v[k] for v in votes if v[k] is not None], len(words))
                if any(v[k] is not None for v in votes) else None
                for k, words in enumerate(ev.tokens)]
    pred = [Bracketing.from_spans(t, s or []) for s, t in zip(averaged, ev.tokens)]
    expect = evaluate_brackets(pred, ev.gold, BracketConventions()).to_dict()["systems"]["model"]
    agreed = run["consensus"]["head-final-test"]
    assert agreed["model"]["sentence_f1"] == pytest.approx(expect["sentence_f1"], abs=1e-12)
    assert agreed["perplexity"] is None
    row = result["summary"]["em, consensus of restarts"]["head-final-test"]
    assert row["sentence_f1"][0] == agreed["model"]["sentence_f1"]
    assert "| em, consensus of restarts |" in result["tables"]["head-final-test"]


def test_smoke_run_of_the_lexicalized_row_scores_attachment(tmp_path):
    # A tiny head-final run of the em and lexicalized rows. References: the em row's scores and
    # table line as the bracket path computes them without heads (no attachment keys added);
    # for the lexicalized row, the model read back from its run folder, its heads written into
    # the CoNLL-U of scripts/make_headed_language.py (the true heads, drawn with the same seed)
    # and scored from those files as `treewright evaluate` scores them; under
    # --function-words known the same heads converted by head_conventions (its own tests check
    # the conversion), with the function words read from the true CoNLL-U's tags.
    import importlib
    from treewright.export.heads import fill_heads_conllu
    from treewright.head_conventions import PUNCTUATION, content_parse_heads
    from treewright.induce import load_lexicalized
    from treewright.report.scoring import evaluate_heads_files
    sys.path.insert(0, str(REPO / "scripts"))
    headed = importlib.import_module("make_headed_language")
    result = bench.main(["--data", "head-final", "--train-sentences", "60", "--test-sentences",
                         "12", "--epochs", "1", "--symbols", "4,6", "--seeds", "0",
                         "--methods", "em,lexicalized", "--override", "model.head_classes=4",
                         "--override", "model.embedding_dim=16", "--function-words", "known",
                         "--out", str(tmp_path)])
    name = "head-final-test"
    em, lex = (r["scores"][name] for r in result["runs"])
    # The lexicalized row is staged on the em row of its seed: that run's trees are its brackets.
    assert f"constraints.brackets_from={tmp_path / 'em-seed0'}" in result["runs"][1]["overrides"]
    log = (tmp_path / "lexicalized-seed0" / "train.log").read_text(encoding="utf-8")
    assert f"partial brackets from {tmp_path / 'em-seed0' / 'grammar.pcfg'} (mbr)" in log
    assert "attachment" not in em and "directed" not in result["summary"]["em"][name]
    assert em == bench.score_grammar(tmp_path / "em-seed0" / "grammar.pcfg", result_evals(tmp_path))
    headed.write_order("head-final", tmp_path / "true", 60, 12, 15, 0)
    gold = tmp_path / "true" / "head-final" / "test.conllu"
    loaded = load_lexicalized(tmp_path / "lexicalized-seed0")
    words = [line.split() for line in (tmp_path / "true" / "head-final" / "test.txt")
             .read_text(encoding="utf-8").splitlines()]
    heads = [p.heads or None for p in loaded.parse(words)]
    pred = tmp_path / "pred.conllu"
    pred.write_text(fill_heads_conllu(gold, heads), encoding="utf-8")
    want = evaluate_heads_files(pred, gold).attachment.to_dict()["systems"]
    assert lex["attachment"] == want
    row = result["summary"]["lexicalized"][name]
    assert row["directed"][0] == want["model"]["directed"]
    assert row["ned"][0] == want["model"]["ned"]
    table = result["attachment_tables"][name]
    assert f"| lexicalized | {100 * want['model']['directed']:.1f} |" in table
    r = want["right_chain"]
    assert (f"| right chain | {100 * r['directed']:.1f} | {100 * r['undirected']:.1f} | "
            f"{100 * r['ned']:.1f} |") in table
    assert set(result["attachment_tables"]) == {name}

    # The content-head row. The function words of the test sentences, by their true tags, are
    # among those the benchmark lists, and no word of a content tag is listed.
    sentences = conllu.parse(gold.read_text(encoding="utf-8"))
    tagged = {(t["form"], t["upos"]) for s in sentences for t in s}
    listed = set(result["function_words"]["words"])
    assert result["function_words"]["source"] == "known"
    assert {w for w, tag in tagged if tag not in headed.CONTENT_TAGS + ("PUNCT",)} <= listed
    assert not {w for w, tag in tagged if tag in headed.CONTENT_TAGS} & listed
    converted = content_parse_heads(words, loaded.parse(words), frozenset(listed) | PUNCTUATION)
    pred.write_text(fill_heads_conllu(gold, converted), encoding="utf-8")
    want = evaluate_heads_files(pred, gold).attachment.to_dict()["systems"]["model"]
    assert lex["attachment_content"] == want
    assert row["content_directed"][0] == want["directed"]
    assert (f"| lexicalized, content heads | {100 * want['directed']:.1f} | "
            f"{100 * want['undirected']:.1f} | {100 * want['ned']:.1f} |") in table
    assert "content_directed" not in result["summary"]["em"][name]


def result_evals(tmp_path):
    # The bench's own head-final test set again (deterministic in its seed), for rescoring.
    (tmp_path / "again").mkdir(exist_ok=True)
    return bench.generated_data("head-final", tmp_path / "again", 60, 12, 15, seed=0).evals[0]


def _read_by_conllu(sentences: int, value) -> dict:
    """The first `sentences` sentences of both treebank sections as the `conllu` library reads
    them (the reference), by their words' forms: a list of `value(tokenlist)` per form."""
    by_text: dict = {}
    for section in ("web", "wiki"):
        with open(bench.treebank_path(section), encoding="utf-8") as handle:
            for _, s in zip(range(sentences), conllu.parse_incr(handle)):
                words = [t for t in s if isinstance(t["id"], int)]
                by_text.setdefault(tuple(t["form"] for t in words), []).append(value(s))
    return by_text


@needs_treebank
def test_turkish_eval_sets_carry_the_treebank_heads_of_their_sentences():
    # Reference: the conllu library's parse of the same files; each scored sentence's gold heads
    # are its HEAD column as written, and its tokens are its non-PUNCT words in order.
    data = bench.turkish_data("tokens", 0.1, 12, sentences=150)
    by_text = _read_by_conllu(150, lambda s: [t for t in s if isinstance(t["id"], int)])
    for ev in data.evals:
        assert ev.dependencies is not None and len(ev.dependencies) == len(ev.tokens) >= 5
        for tokens, dep in zip(ev.tokens, ev.dependencies):
            refs = by_text[dep.words]
            assert any(list(dep.heads) == [t["head"] for t in r]
                       and list(dep.tags) == [t["upos"] for t in r] for r in refs)
            assert tokens == [bench.clean_token(w.lower()) for w, t in zip(dep.words, dep.tags)
                              if t != "PUNCT"]


def _joins_read_by_conllu(tokenlist) -> list[bool]:
    """Per word, whether it is written joined to the word before (the `conllu` library's read,
    the reference): the token before it (the multiword token that ends at the word before, or
    that word itself) has SpaceAfter=No, or both lie in one multiword token."""
    ranges = [t["id"] for t in tokenlist if isinstance(t["id"], tuple) and t["id"][1] == "-"]
    glued = {t["id"][2] if isinstance(t["id"], tuple) else t["id"]
             for t in tokenlist if (t["misc"] or {}).get("SpaceAfter") == "No"
             and (isinstance(t["id"], int) or t["id"][1] == "-")}
    inside = {k for lo, _, hi in ranges for k in range(lo + 1, hi + 1)}
    owned = {k for lo, _, hi in ranges for k in range(lo, hi + 1)}
    words = [t["id"] for t in tokenlist if isinstance(t["id"], int)]
    # SpaceAfter on a word inside a multiword token is ignored (the token's line says it).
    return [k > 1 and (k in inside or (k - 1 in glued and (k - 1 not in owned
                                                            or k - 1 in {hi for *_, hi in ranges}))
                       ) for k in words]


@needs_treebank
def test_turkish_eval_sets_bar_the_pieces_of_their_written_words():
    # Reference: the `conllu` library's read of the same files. A scored sentence's barred
    # positions are the kept (non-PUNCT) words written joined to the kept word just before them;
    # a removed word between two pieces breaks the join, as the benchmark's training text does.
    data = bench.turkish_data("tokens", 0.1, 12, sentences=150)

    def barred(tokenlist):
        joins = _joins_read_by_conllu(tokenlist)
        words = [w for w in tokenlist if isinstance(w["id"], int)]
        kept = [k for k, w in enumerate(words) if w["upos"] != "PUNCT"]
        return [n for n, k in enumerate(kept) if n > 0 and joins[k] and kept[n - 1] == k - 1]

    by_text = _read_by_conllu(150, barred)
    some = 0
    for ev in data.evals:
        assert ev.barred is not None and len(ev.barred) == len(ev.tokens)
        for barred, dep in zip(ev.barred, ev.dependencies):
            assert barred in by_text[dep.words]
            some += bool(barred)
    assert some >= 20


@needs_treebank
def test_turkish_run_is_decoded_under_the_constraint_it_trained_with(tmp_path):
    # A tiny Turkish run (one epoch, two restarts) trains under the word-piece constraint, host
    # first, as the README says, and to its end, so its trees are decoded under it. Reference:
    # the library's decoders with the same barred positions (checked against enumeration in
    # test_decode.py), scored by `evaluate_brackets`; perplexity from the unconstrained
    # inside scores (`inference.score`).
    from treewright.decode import consensus, decode
    from treewright.evaluation import BracketConventions, evaluate_brackets
    from treewright.grammar import load_grammar
    from treewright.inference import score
    result = bench.main(["--data", "turkish", "--methods", "em", "--epochs", "1", "--symbols",
                         "4,6", "--restarts", "2", "--seeds", "0", "--max-length", "10",
                         "--eval-max-length", "10", "--out", str(tmp_path)])
    run = result["runs"][0]
    assert run["decoded_word_pieces"] == "first"
    data = bench.turkish_data("tokens", 0.1, 10)
    ev = data.evals[-1]
    assert sum(map(bool, ev.barred)) >= 50

    def scored(trees):
        pred = [Bracketing.from_spans(t, [] if d.tree is None else
                                      [(i, j) for i, j in Bracketing.from_tree(d.tree).unlabeled()
                                       if j - i >= 2])
                for d, t in zip(trees, ev.tokens)]
        return evaluate_brackets(pred, ev.gold, BracketConventions()).to_dict()["systems"]["model"]

    folder = tmp_path / "em-seed0"
    grammars = [load_grammar(folder / f"restart-{r}.pcfg", tolerance=1e-4) for r in (0, 1)]
    kept = run["best_restart"]
    pieces = ("first", ev.barred)
    got = run["scores"]["wiki"]
    assert got["model"] == scored(decode(grammars[kept], ev.tokens, "mbr", pieces=pieces))
    words = sum(map(len, ev.tokens))
    logz = sum(s.logprob for s in score(grammars[kept], ev.tokens, dtype=torch.float64))
    assert got["perplexity"] == pytest.approx(math.exp(-logz / words), rel=1e-9)
    ordered = [grammars[kept], grammars[1 - kept]]
    assert run["consensus"]["wiki"]["model"] == scored(consensus(ordered, ev.tokens,
                                                                 pieces=pieces))
    # Without the constraint the trees differ: it did something.
    assert got["model"] != scored(decode(grammars[kept], ev.tokens, "mbr"))


@needs_treebank
def test_turkish_lexicalized_row_is_decoded_under_the_constraint(tmp_path):
    # The staged lexicalized row on Turkish tokens trains under the word-piece constraint to
    # its end, so its trees and heads are decoded under it, as `parse` decodes them.
    # References: the library's `decode_lexicalized` and `decode_heads` under the same barred
    # positions (checked against enumeration in test_lexicalized_commands.py and
    # test_lexicalized.py), scored by `evaluate_brackets` and `evaluate_attachment`.
    from treewright.decode import decode_heads, decode_lexicalized
    from treewright.evaluation import BracketConventions, evaluate_brackets
    from treewright.evaluation.dependencies import evaluate_attachment
    from treewright.grammar import load_grammar
    from treewright.induce import load_lexicalized
    result = bench.main(["--data", "turkish", "--methods", "lexicalized", "--epochs", "1",
                         "--lexicalized-epochs", "1", "--symbols", "4,6", "--restarts", "2",
                         "--seeds", "0", "--max-length", "10", "--eval-max-length", "10",
                         "--override", "model.head_classes=4", "--override",
                         "model.embedding_dim=16", "--out", str(tmp_path)])
    em, lex = result["runs"]
    assert (em["decoded_word_pieces"], lex["decoded_word_pieces"]) == ("first", "first")
    ev = bench.turkish_data("tokens", 0.1, 10).evals[-1]
    pieces = ("first", ev.barred)
    run = tmp_path / "lexicalized-seed0"
    loaded = load_lexicalized(run)
    grammar = load_grammar(run / "grammar.pcfg", tolerance=1e-4)
    trees = decode_lexicalized(loaded.model, loaded.vocab, grammar, ev.tokens, pieces=pieces)
    pred = [Bracketing.from_spans(t, [] if d.tree is None else
                                  [(i, j) for i, j in Bracketing.from_tree(d.tree).unlabeled()
                                   if j - i >= 2]) for d, t in zip(trees, ev.tokens)]
    got = lex["scores"]["wiki"]
    want = evaluate_brackets(pred, ev.gold, BracketConventions()).to_dict()["systems"]["model"]
    assert got["model"]["sentence_f1"] == pytest.approx(want["sentence_f1"], abs=1e-12)
    heads = decode_heads(loaded.model, loaded.vocab, ev.tokens, loaded.nonterminals,
                         loaded.preterminals, pieces=pieces)
    attachment = evaluate_attachment([p.heads or None for p in heads], ev.dependencies,
                                     BracketConventions()).to_dict()["systems"]["model"]
    assert got["attachment"]["model"]["directed"] == attachment["directed"]
    # Perplexity sums every tree, as without the constraint.
    free = decode_lexicalized(loaded.model, loaded.vocab, grammar, ev.tokens)
    words = sum(len(t) for t, d in zip(ev.tokens, free) if d.tree is not None)
    logz = sum(d.log_likelihood for d in free if d.tree is not None)
    assert got["perplexity"] == pytest.approx(math.exp(-logz / words), rel=1e-6)
