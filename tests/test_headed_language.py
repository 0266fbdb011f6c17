"""The invented languages with true heads (scripts/make_headed_language.py).

References: the head convention stated again here, independently of the head marks in
scripts/make_demo_data.py (content words head, as in Universal Dependencies, common practice:
a particle or the final mark depends on the other child; otherwise the head is the last child
in head-final and the first in head-initial), applied to every node of a few sampled trees by
a different formulation (a word's head is the head word of the lowest node above it that it
does not head); projectivity and subtree yields checked by this file's own walks over the
heads; the generating grammar's rule table (every node a rule of positive probability); the
benchmark's own drawing (`bench_induction.generated_data`) for the sentences; the `conllu`
package and treewright's corpus reader for the written files. The README's chain rows are
checked for consistency (they reproduce), not as a reference.
"""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

import conllu
import pytest
import torch

from treewright.corpus import read_corpus
from treewright.trees import Tree

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO / "scripts"))
_spec = importlib.util.spec_from_file_location("make_headed_language",
                                               REPO / "scripts" / "make_headed_language.py")
headed = importlib.util.module_from_spec(_spec)
sys.modules["make_headed_language"] = headed
_spec.loader.exec_module(headed)
bench = sys.modules["bench_induction"]

PARTICLES = {"POST", "GEN", "COMP", "SUB", "REL", "PUNCT"}


def node_list(tree: Tree, order: str):
    """(start, end, head word) of every phrase, 0-based half-open spans, 1-based head words,
    with the head child chosen by the convention stated in the module docstring."""
    nodes = []

    def walk(node, start):
        if node.is_preterminal():
            return start + 1, start + 1          # (end, head word)
        assert len(node.children) == 2
        left, right = node.children
        mid, left_head = walk(left, start)
        end, right_head = walk(right, mid)
        if left.label in PARTICLES:
            head = right_head
        elif right.label in PARTICLES:
            head = left_head
        else:
            head = right_head if order == "head-final" else left_head
        nodes.append((start, end, head))
        return end, head

    walk(tree, 0)
    return nodes


def reference_heads(tree: Tree, order: str) -> list[int]:
    nodes = node_list(tree, order)
    heads = []
    for word in range(1, len(tree.leaves()) + 1):
        above = [(end - start, head) for start, end, head in nodes
                 if start < word <= end and head != word]
        heads.append(min(above)[1] if above else 0)
    return heads


def dominated(heads: list[int], word: int, by: int) -> bool:
    while word != 0:
        if word == by:
            return True
        word = heads[word - 1]
    return False


@pytest.mark.parametrize("order", ["head-final", "head-initial"])
def test_heads_follow_the_rules_and_are_projective(order):
    grammar, train, test = headed.draw(order, 40, 10, 15, seed=3)
    table = headed.head_children(order)
    symbols = {name: k for k, name in enumerate(grammar.symbols)}
    binary = grammar.binary.double().exp()
    phrases = 0
    for tree in train + test:
        heads, relations = headed.tree_heads(tree, table)
        assert heads == reference_heads(tree, order)
        assert heads.count(0) == 1 and relations[heads.index(0)] == "root"
        n = len(heads)
        for node in tree.subtrees():             # every phrase is a rule of the grammar
            if not node.is_preterminal():
                a, b, c = (symbols[x.label] for x in (node, *node.children))
                assert binary[a, b, c] > 0
                phrases += 1
        spans = {(s, e) for s, e, _ in node_list(tree, order)}
        for word, head in enumerate(heads, start=1):
            if head:
                # Projective: every word between a head and its dependent is under the head.
                assert all(dominated(heads, w, head)
                           for w in range(min(word, head) + 1, max(word, head)))
            below = [w for w in range(1, n + 1) if dominated(heads, w, word)]
            # A word with dependents spans a phrase of the generating tree (its highest one).
            if len(below) > 1:
                assert (min(below) - 1, max(below)) in spans
    assert phrases > 100   # enough nodes that every rule kind is likely met


def test_head_marks_cover_every_phrase_rule_of_both_orders():
    for order in ("head-final", "head-initial"):
        grammar = headed.order_grammar(order)
        table = headed.head_children(order)
        nt = len(grammar.nonterminals)
        used = {(grammar.symbols[a], grammar.symbols[b], grammar.symbols[c])
                for a, b, c in torch.nonzero(grammar.binary.exp() > 0).tolist() if a < nt}
        assert used == set(table)


def test_sentences_are_the_benchmarks_and_files_read_back(tmp_path):
    counts = headed.write_order("head-final", tmp_path, 30, 10, 15, seed=5)
    assert counts == {"train": 30, "test": 10}
    (tmp_path / "bench").mkdir()
    data = bench.generated_data("head-final", tmp_path / "bench", 30, 10, 15, seed=5)
    folder = tmp_path / "head-final"
    parsed = conllu.parse((folder / "test.conllu").read_text(encoding="utf-8"))
    assert [[t["form"] for t in s] for s in parsed] == data.evals[0].tokens
    assert [line.split() for line in (folder / "train.txt").read_text().splitlines()] == \
        data.train_tokens
    _, _, test = headed.draw("head-final", 30, 10, 15, seed=5)
    for sentence, tree in zip(parsed, test):
        assert [t["head"] for t in sentence] == reference_heads(tree, "head-final")
        assert sentence.metadata["tree"] == tree.to_string()
    corpus = read_corpus(folder / "test.conllu", "conllu")
    assert corpus.report.sentences_used == 10 and all(s.heads for s in corpus.sentences)


def test_readme_chain_rows_reproduce():
    # Consistency with the documentation, not a reference: the README's chain baselines for
    # the default flags (5,000 + 500 sentences, at most 15 words, seed 0) come out again.
    import re

    from treewright.evaluation import Dependencies, evaluate_attachment
    readme = (REPO / "README.md").read_text(encoding="utf-8")
    for order in ("head-final", "head-initial"):
        row = re.search(rf"\| {order}, 500 test sentences \(default flags\) \| ([\d,]+) \| "
                        r"([\d.]+) / ([\d.]+) / ([\d.]+) \| ([\d.]+) / ([\d.]+) / ([\d.]+) \|",
                        readme)
        assert row, f"README has no chain row for {order}"
        _, _, test = headed.draw(order, 5000, 500, 15, seed=0)
        table = headed.head_children(order)
        gold = [Dependencies(tuple(t.leaves()), tuple(headed.tree_heads(t, table)[0]),
                             tuple(n.label for n in t.subtrees() if n.is_preterminal()))
                for t in test]
        systems = evaluate_attachment(None, gold).systems
        left, right = systems["left_chain"], systems["right_chain"]
        assert int(row[1].replace(",", "")) == left.words
        assert [float(x) for x in row.groups()[1:]] == [
            round(100 * v, 1) for v in (left.directed, left.undirected, left.ned,
                                        right.directed, right.undirected, right.ned)]


def test_lexical_selection_keeps_trees_and_heads_and_has_its_strength(tmp_path):
    # References: the trees drawn without selection (same seed: the selection only redraws
    # words), the head convention of this file (`reference_heads`), the grammar's own word
    # lists per tag, and a count against the definition of the selection: a content word whose
    # head is a content word takes its head's class with probability s + (1 - s) / C (a class
    # drawn uniformly after a miss can be the head's), a binomial proportion checked to within
    # five standard deviations.
    strength, classes = 0.8, headed.SELECTION_CLASSES
    plain = headed.draw("head-final", 1500, 0, 15, seed=3)[1]
    grammar, chosen, _ = headed.draw("head-final", 1500, 0, 15, seed=3, selection=strength)
    lexicon = headed.selection_lexicon(grammar)
    nt = len(grammar.nonterminals)
    for tag, groups in lexicon.items():
        assert tag in headed.CONTENT_TAGS and len(groups) == classes
        k = grammar.preterminals.index(tag)
        tagged = {w for w, p in zip(grammar.vocab.words, grammar.lexical[nt + k].exp()) if p > 0}
        assert sorted(w for words, _ in groups for w in words) == sorted(tagged)
    class_of = {(tag, w): c for tag, groups in lexicon.items()
                for c, (words, _) in enumerate(groups) for w in words}
    same = pairs = changed = 0
    for before, after in zip(plain, chosen):
        assert [n.label for n in before.subtrees()] == [n.label for n in after.subtrees()]
        heads = reference_heads(after, "head-final")
        assert heads == reference_heads(before, "head-final")
        tags = [n.label for n in after.subtrees() if n.is_preterminal()]
        words, old = after.leaves(), before.leaves()
        for k, (tag, word, head) in enumerate(zip(tags, words, heads)):
            if tag not in headed.CONTENT_TAGS or head == 0:
                assert word == old[k]          # function words and the root's word stay
                continue
            assert tags[head - 1] in headed.CONTENT_TAGS   # content words head
            pairs += 1
            changed += word != old[k]
            same += class_of[(tag, word)] == class_of[(tags[head - 1], words[head - 1])]
    expected = strength + (1 - strength) / classes
    sd = (expected * (1 - expected) / pairs) ** 0.5
    assert pairs > 2000 and abs(same / pairs - expected) < 5 * sd
    assert changed > pairs / 2          # the content dependents were drawn again
    for bad in (1.5, -0.1):
        with pytest.raises(ValueError, match="probability"):
            headed.draw("head-final", 10, 0, 15, seed=3, selection=bad)
    # The benchmark reads the same text, with no ceiling (the grammar is not the text's model).
    data = bench.generated_data("head-final", tmp_path, 1400, 100, 15, seed=3,
                                selection=strength)
    assert data.train_tokens == [t.leaves() for t in chosen[:1400]]
    assert data.evals[0].tokens == [t.leaves() for t in chosen[1400:]]
    assert data.ceiling is None and not list(tmp_path.iterdir())
