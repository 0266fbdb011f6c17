"""CoNLL-U export: HEAD and DEPREL read off the induced tree by a head rule, and read back.

References: the `conllu` package reads the export; the CoNLL-U standard (and common practice)
wants HEAD to form a tree over the words, one word attached to 0 and no cycles, checked here by
this file's own walk; head percolation (Collins 1999, "Head-Driven Statistical Models for
Natural Language Parsing") recomputed here recursively, independently of the exporter's
iterative walk; the subtree yields of the exported heads, computed here, must be the spans of
each word's maximal projection in the induced tree; entropies of the hand grammars worked by
hand. Toy data: the Velmar harbour grammar of test_export.py.
"""

from __future__ import annotations

import conllu
import pytest

from test_export import VELMAR, run_cli, sample_sentences, write_lines
from treewright.corpus import read_corpus
from treewright.errors import InputError
from treewright.export import dependency_heads, head_rule, parse_corpus, to_conllu
from treewright.export.parses import auto_head_sides
from treewright.grammar import parse_grammar
from treewright.report.scoring import evaluate_files
from treewright.inference import viterbi_parse
from treewright.trees import Tree


def reference_heads(tree: Tree, side) -> list[int]:
    """Head percolation, recursively: returns HEAD per word (1-based; 0 for the root)."""
    heads: dict[int, int] = {}
    counter = [0]

    def lexical_head(node) -> int:
        if isinstance(node, str):
            counter[0] += 1
            return counter[0]
        below = [lexical_head(c) for c in node.children]
        head = below[0] if side(node.label) == "left" else below[-1]
        for b in below:
            if b != head:
                heads[b] = head
        return head

    heads[lexical_head(tree)] = 0
    return [heads[i] for i in range(1, len(tree.leaves()) + 1)]


def maximal_projections(tree: Tree, side) -> set[tuple[int, int]]:
    """The span (0-based, half-open) of the highest node each word heads."""
    spans: dict[int, tuple[int, int]] = {}
    position = [0]

    def walk(node) -> tuple[int, int, int]:  # (head word, start, end)
        if isinstance(node, str):
            position[0] += 1
            return position[0], position[0] - 1, position[0]
        parts = [walk(c) for c in node.children]
        head = parts[0][0] if side(node.label) == "left" else parts[-1][0]
        start, end = parts[0][1], parts[-1][2]
        spans[head] = (start, end)  # a higher node of the same head overwrites a lower one
        return head, start, end

    walk(tree)
    return set(spans.values())


def is_tree(heads: list[int]) -> bool:
    """One word on 0, and every word reaches 0 without meeting itself (CoNLL-U standard)."""
    if sum(1 for h in heads if h == 0) != 1:
        return False
    for start in range(1, len(heads) + 1):
        seen, node = set(), start
        while node != 0:
            if node in seen:
                return False
            seen.add(node)
            node = heads[node - 1]
    return True


def subtree_yields(heads: list[int]) -> set[tuple[int, int]]:
    """The 0-based half-open span of each word's dependency subtree (projective heads)."""
    members = {i: {i} for i in range(1, len(heads) + 1)}
    for i in range(1, len(heads) + 1):
        j = heads[i - 1]
        while j != 0:
            members[j].add(i)
            j = heads[j - 1]
    out = set()
    for m in members.values():
        assert max(m) - min(m) + 1 == len(m)  # contiguous: the heads are projective
        out.add((min(m) - 1, max(m)))
    return out


@pytest.fixture
def grammar():
    return parse_grammar(VELMAR)


@pytest.mark.parametrize("choice", ["auto", "left", "right"])
def test_export_reads_back_and_its_heads_are_the_induced_tree(grammar, tmp_path, choice):
    sentences = sample_sentences(grammar, num=12, seed=7)
    text = write_lines(tmp_path / "s.txt", sentences)
    out = tmp_path / "out.conllu"
    code, _, err = run_cli("export", _save(grammar, tmp_path), "--to", "conllu", "--corpus", text, "--out", out, "--heads", choice)
    assert code == 0, err
    rule = head_rule(choice, grammar)
    trees = [t for t, _ in viterbi_parse(grammar, sentences)]
    assert all(t is not None for t in trees)
    exported = conllu.parse(out.read_text(encoding="utf-8"))  # reference reader
    ours = read_corpus(out, "conllu")  # treewright's own reader, strict: no sentence skipped
    assert len(ours.sentences) == len(exported) == len(sentences)
    for sent, mine, tree in zip(exported, ours.sentences, trees):
        heads = [tok["head"] for tok in sent]
        assert heads == reference_heads(tree, rule.side)
        assert is_tree(heads)
        assert [tok["deprel"] for tok in sent] == ["root" if h == 0 else "dep" for h in heads]
        assert sent.metadata["head_rule"] == choice
        # Heads back to brackets: each word's subtree yield is its maximal projection, a
        # constituent of the induced tree.
        yields = subtree_yields(heads)
        assert yields == maximal_projections(tree, rule.side)
        assert yields <= {(i, j) for i, j, _ in tree.labeled_spans()}
        # treewright's reader turns the heads into the same brackets (phrases of width >= 2).
        assert {(i, j) for i, j, _ in mine.tree.labeled_spans() if j - i > 1} == \
            {s for s in yields if s[1] - s[0] > 1}
        assert mine.heads == heads


def _save(grammar, tmp_path):
    path = tmp_path / "velmar.pcfg"
    grammar.save(path)
    return path


def test_auto_takes_the_side_the_grammar_predicts_better_and_mirrors():
    # A's left child is always B (entropy 0); its right child is C or D (entropy ln 2 > 0, by
    # hand); the same for S with A against E or F. The mirror grammar reverses every rule.
    lexicon = 'B -> "b" 1.0\nC -> "c" 1.0\nD -> "d" 1.0\nE -> "e" 1.0\nF -> "f" 1.0\n'
    forward = parse_grammar('@start S\nS -> A E 0.5\nS -> A F 0.5\nA -> B C 0.5\n'
                            'A -> B D 0.5\n' + lexicon)
    mirror = parse_grammar('@start S\nS -> E A 0.5\nS -> F A 0.5\nA -> C B 0.5\n'
                           'A -> D B 0.5\n' + lexicon)
    assert auto_head_sides(forward) == {"S": "left", "A": "left"}
    assert auto_head_sides(mirror) == {"S": "right", "A": "right"}
    fwd = viterbi_parse(forward, [["b", "c", "e"]])[0][0]
    mir = viterbi_parse(mirror, [["e", "c", "b"]])[0][0]
    h_fwd = dependency_heads(fwd, head_rule("auto", forward))
    h_mir = dependency_heads(mir, head_rule("auto", mirror))
    assert h_fwd == [0, 1, 1]  # b heads A (over c) and S (over e); by hand
    # The mirrored sentence gets the mirrored arcs: word k of n is word n + 1 - k.
    n = 3
    assert h_mir == [0 if h_fwd[n - k] == 0 else n + 1 - h_fwd[n - k] for k in range(1, n + 1)]


def test_auto_breaks_an_exact_tie_to_the_left():
    # One rule per symbol: both children are certain (entropy 0 on both sides).
    tied = parse_grammar('@start S\nS -> B C 1.0\nB -> "b" 1.0\nC -> "c" 1.0\n')
    assert auto_head_sides(tied) == {"S": "left"}


def test_an_unparsed_sentence_keeps_its_words_and_is_refused_as_gold(grammar, tmp_path):
    lines = [(1, sample_sentences(grammar, num=1, seed=2)[0]), (2, ["ka", "ul"])]
    path = tmp_path / "out.conllu"
    path.write_text(to_conllu(parse_corpus(grammar, lines), rule=head_rule("left")),
                    encoding="utf-8")
    # Every head `_`: CoNLL-U text that is only tokenized, read with its words and no tree.
    corpus = read_corpus(path, "conllu")
    assert [s.tree is None for s in corpus.sentences] == [False, True]
    assert corpus.sentences[1].words == ["ka", "ul"]
    # Where a tree is needed, as gold, it is refused naming the file and the sentence's line.
    pred = tmp_path / "pred.trees"
    pred.write_text("".join(f"{s.tree if s.tree else '(X (A ka) (A ul))'}\n"
                            for s in corpus.sentences), encoding="utf-8")
    with pytest.raises(InputError) as caught:
        evaluate_files(pred, path)
    assert str(path) in str(caught.value) and "no tree" in str(caught.value)
    assert f"line {corpus.sentences[1].line}:" in str(caught.value)


@pytest.mark.parametrize("side", ["left", "right"])
def test_wide_and_mixed_nodes_follow_the_recursive_reference(side):
    # Trees from elsewhere may be n-ary and hold words beside phrases; the exporter's Viterbi
    # trees never do, but dependency_heads is a library call.
    tree = Tree("S", [Tree("A", ["a", "b"]), "c", Tree("B", ["d", Tree("C", ["e", "f", "g"])]),
                      "h"])
    heads = dependency_heads(tree, head_rule(side))
    assert heads == reference_heads(tree, lambda label: side)
    assert is_tree(heads)
    # By hand: left heads everything on its first word, right on its last.
    assert heads == ([0, 1, 1, 1, 4, 5, 5, 1] if side == "left" else [2, 8, 8, 7, 7, 7, 8, 0])
