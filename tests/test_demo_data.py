"""The shipped demo data (src/treewright/data/demo): reproducible, well formed, as documented.

References: a fresh run of scripts/make_demo_data.py (byte-for-byte), facts of the trade
(probabilities per left-hand side sum to one; p(sentence) is the sum over its trees, so it is
at least p(gold tree)), and the numbers written in the data README.
"""

from __future__ import annotations

import importlib.util
import math
import re
from collections import defaultdict
from fractions import Fraction
from pathlib import Path

import pytest

from treewright.corpus import read_corpus
from treewright.evaluation.brackets import evaluate_brackets
from treewright.grammar import load_grammar
from treewright.inference import corpus_summary, score, tree_logprob, viterbi_parse
from treewright.trees import Tree

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "src" / "treewright" / "data" / "demo"
SCRIPT = ROOT / "scripts" / "make_demo_data.py"


def _load_script():
    spec = importlib.util.spec_from_file_location("make_demo_data", SCRIPT)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


maker = _load_script()
GENERATED = ["grammar.pcfg", "lexicon.tsv", "train.txt", "dev.txt", "dev.trees", "test.txt",
             "test.trees"]


def _lines(name: str) -> list[str]:
    return (DEMO / name).read_text(encoding="utf-8").splitlines()


def _readme_row(split: str, section: str = "## The ceiling") -> list[float]:
    """The numbers of the README's table row for `split` in `section`."""
    text = (DEMO / "README.md").read_text(encoding="utf-8")
    assert section in text
    text = text.split(section, 1)[1].split("\n## ", 1)[0]
    match = re.search(rf"^\| {split} \| ([^\n]*)\|$", text, re.MULTILINE)
    assert match, f"README.md has no row for {split} under {section!r}"
    return [float(cell) for cell in match.group(1).split("|")]


@pytest.fixture(scope="module")
def grammar():
    return load_grammar(DEMO / "grammar.pcfg")


@pytest.fixture(scope="module")
def gold():
    """The shipped gold trees, read with the project's bracket reader."""
    return {name: [s.tree for s in read_corpus(DEMO / f"{name}.trees").sentences]
            for name in ("dev", "test")}


@pytest.fixture(scope="module")
def scored_test_set(grammar):
    """Inside scores of the raw test sentences under the generating grammar (computed once:
    the inside pass is the slow part of this file)."""
    return score(grammar, [line.split() for line in _lines("test.txt")])


def test_shipped_files_equal_a_fresh_regeneration(tmp_path):
    # Reference: the generator itself, run again with the documented seed.
    counts = maker.write_demo_data(tmp_path)
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(GENERATED)
    for name in GENERATED:
        assert (tmp_path / name).read_bytes() == (DEMO / name).read_bytes(), name
    # Nothing else lives in the package folder but the hand-written README.
    assert sorted(p.name for p in DEMO.iterdir()) == sorted(GENERATED + ["README.md"])
    assert counts["filtered_out"] == 0  # documented in the README: the filter left out none


def test_a_different_seed_gives_different_sentences(tmp_path):
    # Guards the comparison above: the seed really reaches the sampler.
    maker.write_demo_data(tmp_path, seed=maker.SEED + 1)
    assert (tmp_path / "train.txt").read_bytes() != (DEMO / "train.txt").read_bytes()
    assert (tmp_path / "grammar.pcfg").read_bytes() == (DEMO / "grammar.pcfg").read_bytes()


def test_grammar_rules_sum_to_one_per_left_hand_side(grammar):
    # Fact of the trade (common practice): a PCFG's rule probabilities for each left-hand side
    # sum to one. Checked exactly on the decimals as written, independently of the loader.
    totals: dict[str, Fraction] = defaultdict(Fraction)
    for line in (DEMO / "grammar.pcfg").read_text(encoding="utf-8").splitlines():
        if line and not line.startswith(("#", "@")):
            lhs, _, *_, prob = line.split()
            totals[lhs] += Fraction(prob)
    assert totals and all(total == 1 for total in totals.values()), totals
    assert grammar.normalization_error() < 1e-12
    # The sizes the README documents, learnable by the induction defaults (30 / 60).
    assert len(grammar.nonterminals) == 10 and len(grammar.preterminals) == 16
    assert len(grammar.vocab) == 230
    assert grammar.start == "S" and grammar.root_is_symbol


def test_lexicon_lists_every_grammar_word_once(grammar):
    rows = [line.split("\t") for line in _lines("lexicon.tsv")[1:]]
    assert all(len(row) == 3 and row[2] for row in rows)
    assert sorted(form for form, _, _ in rows) == sorted(grammar.vocab.words)
    assert {tag for _, tag, _ in rows} == set(grammar.preterminals)


@pytest.mark.parametrize("name,size", [("train.txt", 2000), ("dev.txt", 200), ("test.txt", 200)])
def test_sentence_counts_and_lengths_are_as_documented(name, size, grammar):
    lines = _lines(name)
    assert len(lines) == size == maker.SIZES[name.split(".")[0]]
    lengths = []
    for line in lines:
        words = line.split(" ")
        assert all(words), f"{name}: tokens must be separated by single spaces: {line!r}"
        assert maker.MIN_WORDS <= len(words) <= maker.MAX_WORDS == 20
        assert all(w in grammar.vocab for w in words)
        assert words[-1] in (".", "!")
        lengths.append(len(words))
    assert 8.0 <= sum(lengths) / len(lengths) <= 10.0  # the brief's mean length of 8-10
    # The README's sampling table: sentences, tokens, mean length, min, max.
    documented = _readme_row(name.split(".")[0], "## Sampling")
    assert documented == [size, sum(lengths), round(sum(lengths) / size, 2), min(lengths),
                          max(lengths)]


def test_overlap_between_test_and_train_is_as_documented():
    # Duplicates are kept as drawn; the README states how many test sentences occur in train.
    train = set(_lines("train.txt"))
    overlap = sum(line in train for line in _lines("test.txt"))
    assert f"{overlap} test sentences also occur in the training set" in \
        " ".join((DEMO / "README.md").read_text(encoding="utf-8").split())


def test_total_size_is_small():
    assert sum(p.stat().st_size for p in DEMO.iterdir()) < 1_000_000


@pytest.mark.parametrize("split", ["dev", "test"])
def test_gold_trees_are_cnf_with_positive_probability(split, grammar, gold):
    trees = gold[split]
    raw = _lines(f"{split}.txt")
    assert len(trees) == len(raw) == 200
    for tree, line in zip(trees, raw):
        assert " ".join(tree.leaves()) == line
        assert tree.label == "S"
        for node in tree.subtrees():
            if node.is_preterminal():
                assert node.label in grammar.preterminals
            else:
                assert len(node.children) == 2 and all(isinstance(c, Tree) for c in node.children)
                assert node.label in grammar.nonterminals
        assert tree_logprob(grammar, tree) > -math.inf


def test_sentence_probability_is_at_least_its_gold_tree_probability(grammar, gold, scored_test_set):
    # Fact of the trade: p(sentence) sums p(tree) over its trees, so it is >= p(gold tree).
    # The inside pass runs in float32, hence the small slack.
    for tree, scored in zip(gold["test"], scored_test_set):
        assert scored.words == tree.leaves()
        assert scored.logprob >= tree_logprob(grammar, tree) - 1e-3


def test_readme_example_is_a_sentence_of_the_grammar(grammar):
    text = (DEMO / "README.md").read_text(encoding="utf-8")
    example = "sa Orvek vo brosk ko pirnak ma ko tulm lurrik ."
    assert f"    {example}\n" in text
    (result,) = score(grammar, [example.split()])
    assert result.parsed


def test_ceiling_cross_entropy_is_recorded_in_the_readme(scored_test_set):
    summary = corpus_summary(scored_test_set)
    print(f"\nceiling on the demo test set: {summary['cross_entropy_nats']:.4f} nats/token, "
          f"{summary['cross_entropy_bits']:.4f} bits/token, perplexity "
          f"{summary['perplexity']:.2f} over {summary['words']} tokens")
    assert summary["parsed"] == 200 and summary["words"] == 1737
    # Consistency with the documentation, not a target: the README must be regenerated by hand
    # from these numbers whenever the data changes.
    nats, bits, perplexity = _readme_row("test")[:3]
    assert summary["cross_entropy_nats"] == pytest.approx(nats, abs=1e-4)
    assert summary["cross_entropy_bits"] == pytest.approx(bits, abs=1e-4)
    assert summary["perplexity"] == pytest.approx(perplexity, abs=0.01)


def test_ceiling_f1_is_recorded_in_the_readme(grammar, gold):
    trees = gold["test"]
    parsed = viterbi_parse(grammar, [t.leaves() for t in trees], batch_size=64)
    assert all(tree is not None for tree, _ in parsed)
    result = evaluate_brackets([tree for tree, _ in parsed], trees)
    model = result.systems["model"]
    print(f"\nceiling Viterbi F1 on the demo test set: sentence {model.sentence_f1:.4f}, "
          f"corpus {model.corpus_f1:.4f}")
    # Every gold entry ends with one PUNCT token, which the evaluation removes.
    assert result.counts["punctuation_words_removed"] == 200
    sentence_f1, corpus_f1 = _readme_row("test")[3:]
    assert model.sentence_f1 == pytest.approx(sentence_f1, abs=1e-4)
    assert model.corpus_f1 == pytest.approx(corpus_f1, abs=1e-4)
