"""`head_conventions`: induced heads moved to the content-head convention, and the word lists
that drive it.

References:
- recovery on the invented languages of scripts/make_headed_language.py (a known generating
  grammar gives the truth): their true heads follow Universal Dependencies (content words head,
  function words and the final mark depend on them), and the same drawn trees headed the other
  way, each function word heading the phrase it closes or opens (as some treebanks head
  them: the benchmark's Turkish treebank heads its postpositional phrases so), must convert
  back to exactly the true heads;
- hand-worked cases of the Universal Dependencies guidelines' treatment of function words
  (de Marneffe et al. 2021; from memory): an adposition attaches to its noun, a multiword
  function expression stays one unit under the content word, punctuation attaches to the
  clause's head;
- the recursive definition (at each binary node a function-word head yields to a content-word
  sibling), written out again here over random trees.
"""

from __future__ import annotations

import importlib
import random
import sys
from pathlib import Path

import pytest

from treewright.corpus import parse_brackets
from treewright.errors import InputError
from treewright.head_conventions import (PUNCTUATION, UD_FUNCTION, UD_FUNCTION_TAGS,
                                         content_heads, read_function_words)
from treewright.trees import Tree

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO / "scripts"))
headed = importlib.import_module("make_headed_language")


def _tags(tree: Tree) -> list[str]:
    return [node.label for node in tree.subtrees() if node.is_preterminal()]


@pytest.mark.parametrize("order", ["head-final", "head-initial"])
def test_function_heads_of_the_invented_languages_convert_back_to_their_true_heads(order):
    grammar = headed.order_grammar(order)
    trees = headed.draw_trees(order, grammar, 300, 25, seed=3)
    table = headed.head_children(order)
    # The same phrases headed by their function word: every rule whose dependent child is a
    # function tag (or the final mark) takes that child as its head instead.
    function_tags = {t for tree in trees for t in _tags(tree)} - set(headed.CONTENT_TAGS)
    assert {"DET", "POST", "COMP", "SUB", "REL", "PUNCT"} <= function_tags
    flipped = {rule: 1 - side if rule[2 - side] in function_tags else side
               for rule, side in table.items()}
    assert sum(flipped[r] != table[r] for r in table) >= 6
    moved = 0
    for tree in trees:
        truth = headed.tree_heads(tree, table)[0]
        function_heads = headed.tree_heads(tree, flipped)[0]
        moved += sum(a != b for a, b in zip(truth, function_heads))
        flags = [t in function_tags for t in _tags(tree)]
        assert content_heads(tree, function_heads, flags) == truth
        assert content_heads(tree, truth, flags) == truth    # already content-headed: unchanged
    assert moved > 1000   # the two conventions differ on many words


def _heads(bracketed: str, heads: list[int], function: str) -> list[int]:
    tree = parse_brackets(bracketed)[0]
    return content_heads(tree, heads, [w in function.split() for w in tree.leaves()])


def test_hand_worked_cases_of_the_content_head_convention():
    # "stone under lay ." (head-final: the noun, its postposition, the verb, the final mark).
    # Headed by function words: under heads stone, "." heads the clause.
    tree = "(S (CL (PP (N stone) (P under)) (V lay)) (PU .))"
    assert _heads(tree, [2, 3, 4, 0], "under .") == [3, 1, 0, 3]
    # Two postpositions stacked on one noun: the noun heads both, and the verb the noun.
    tree = "(CL (PP (PP (N stone) (P under)) (P from)) (V lay))"
    assert _heads(tree, [2, 3, 4, 0], "under from") == [4, 1, 1, 0]
    # A function word of two words ("in-front of") heads a phrase of its own: it stays one
    # unit, its first word heading the second, under the content word.
    tree = "(PP (PX (P in-front) (P of)) (N stone))"
    assert _heads(tree, [0, 1, 1], "in-front of") == [3, 1, 0]
    # A function word with no content word in its phrase keeps heading ("of" alone).
    assert _heads("(X (P in-front) (P of))", [0, 1], "in-front of") == [0, 1]
    # Content words only: nothing moves; no list: nothing moves.
    tree = "(CL (N stone) (V lay))"
    assert _heads(tree, [2, 0], "") == [2, 0]
    assert _heads("(S (CL (N stone) (V lay)) (PU .))", [2, 3, 0], "") == [2, 3, 0]
    # A one-word sentence, and a preterminal root.
    assert _heads("(V lay)", [0], "lay") == [0]


def _by_definition(tree: Tree, heads: list[int], function: list[bool]) -> list[int]:
    # The definition written out again, recursively: at each binary node the given head child
    # is the one whose head word's head lies outside the node; if its converted head word is
    # a function word and the other child's is not, the other child heads.
    out = [0] * len(heads)
    position = [0]

    def walk(node):
        if node.is_preterminal():
            position[0] += 1
            return position[0] - 1, position[0], position[0], position[0]
        kids = [walk(child) for child in node.children]
        if len(kids) == 1:
            return kids[0]
        (lo, _, left_given, left), (_, hi, right_given, right) = kids
        if not lo < heads[left_given - 1] <= hi:
            given, head, dependent = left_given, left, right
        else:
            given, head, dependent = right_given, right, left
        if function[head - 1] and not function[dependent - 1]:
            head, dependent = dependent, head
        out[dependent - 1] = head
        return lo, hi, given, head

    out[walk(tree)[3] - 1] = 0
    return out


def test_random_trees_follow_the_definition_and_stay_trees():
    rng = random.Random(7)

    def random_tree(lo, hi):
        if hi - lo == 1:
            return Tree("T", [f"w{lo}"])
        k = rng.randint(lo + 1, hi - 1)
        node = Tree("N", [random_tree(lo, k), random_tree(k, hi)])
        return Tree("U", [node]) if rng.random() < 0.1 else node   # unary chains too

    def random_heads(tree, n):
        heads, position = [0] * n, [0]

        def walk(node):
            if node.is_preterminal():
                position[0] += 1
                return position[0]
            kids = [walk(child) for child in node.children]
            if len(kids) == 1:
                return kids[0]
            head, dependent = kids if rng.random() < 0.5 else kids[::-1]
            heads[dependent - 1] = head
            return head

        heads[walk(tree) - 1] = 0
        return heads

    changed = 0
    for _ in range(2000):
        n = rng.randint(1, 10)
        tree = random_tree(0, n)
        heads = random_heads(tree, n)
        function = [rng.random() < 0.4 for _ in range(n)]
        got = content_heads(tree, heads, function)
        assert got == _by_definition(tree, heads, function)
        changed += got != heads
        # One root, and every word reaches it without a cycle.
        assert got.count(0) == 1
        for k in range(1, n + 1):
            seen, h = set(), k
            while h:
                assert h not in seen
                seen.add(h)
                h = got[h - 1]
        assert content_heads(tree, got, function) == got   # converting twice changes nothing
    assert changed > 500


def test_heads_that_do_not_fit_the_tree_are_refused():
    tree = parse_brackets("(S (CL (N stone) (V lay)) (PU .))")[0]
    with pytest.raises(ValueError, match="3 heads but 2"):
        content_heads(tree, [2, 0, 2], [False, True])
    with pytest.raises(ValueError, match="do not derive from the tree"):
        content_heads(tree, [3, 0, 2], [False, False, True])   # "." inside the clause's node
    with pytest.raises(ValueError, match="the tree has 3 words, the heads 2"):
        content_heads(tree, [2, 0], [False, False])
    flat = parse_brackets("(S (N stone) (V lay) (PU .))")[0]
    with pytest.raises(ValueError, match="3 children"):
        content_heads(flat, [2, 0, 2], [False, False, True])


def test_function_word_files_and_the_universal_tags(tmp_path):
    listed = tmp_path / "function.txt"
    listed.write_text("# postpositions\nUnder\n\nfrom\n  # indented comment\n",
                      encoding="utf-8")
    assert read_function_words(listed) == frozenset({"Under", "from"}) | PUNCTUATION
    # Punctuation always counts: it attaches to its clause's head in Universal Dependencies
    # (common practice).
    assert {".", ",", "!", "PUNCT"} <= PUNCTUATION
    # The function-word tags of Universal Dependencies 2 (the relations case, det, mark, aux,
    # cop, cc, punct; from memory), with the older universal tagset's names.
    assert {"ADP", "AUX", "CCONJ", "DET", "PART", "SCONJ", "PUNCT"} <= set(UD_FUNCTION_TAGS)
    assert not {"NOUN", "VERB", "ADJ", "PROPN", "ADV", "NUM"} & set(UD_FUNCTION_TAGS)
    assert read_function_words(UD_FUNCTION) == frozenset(UD_FUNCTION_TAGS) | PUNCTUATION

    bad = tmp_path / "weights.txt"
    bad.write_text("under\nfrom -2\n", encoding="utf-8")
    with pytest.raises(InputError) as err:
        read_function_words(bad)
    assert err.value.line == 2 and str(bad) in str(err.value) and "2 fields" in str(err.value)
    empty = tmp_path / "comments.txt"
    empty.write_text("# nothing yet\n\n", encoding="utf-8")
    with pytest.raises(InputError, match="lists no words"):
        read_function_words(empty)
    with pytest.raises(InputError):
        read_function_words(tmp_path / "missing.txt")


def test_commands_read_the_list_as_the_training_run_read_its_words(tmp_path):
    # `parse` and `export` compare the list with the words as the model reads them: lowercased
    # by the run's own case rules. Reference: Unicode SpecialCasing.txt's Turkish rules (dotted
    # and dotless i; from memory) against its language-independent mapping.
    from types import SimpleNamespace

    from treewright.cli.common import function_words_as_trained
    listed = tmp_path / "function.txt"
    listed.write_text("İÇİN\nILE\nve\n", encoding="utf-8")

    def run(data):
        return SimpleNamespace(training={"config": {"data": data}})

    turkic = function_words_as_trained(str(listed), run({"lowercase": True,
                                                         "case_rules": "turkic"}), False)
    assert {"için", "ıle", "ve"} <= turkic and "ile" not in turkic
    plain = function_words_as_trained(str(listed), run({"lowercase": True}), False)
    assert {"i\u0307çi\u0307n", "ile", "ve"} <= plain
    kept = function_words_as_trained(str(listed), run({"lowercase": False}), False)
    assert {"İÇİN", "ILE", "ve"} <= kept
    # Tags are never lowercased, and the UD tags need a run on tags.
    assert function_words_as_trained(UD_FUNCTION, run({"lowercase": True, "tag_mode": True}),
                                     True) == frozenset(UD_FUNCTION_TAGS) | PUNCTUATION
    with pytest.raises(InputError, match="trained on words"):
        function_words_as_trained(UD_FUNCTION, run({}), False)


def test_export_refuses_function_words_without_heads(tmp_path, capsys):
    from treewright.cli import main
    listed = tmp_path / "function.txt"
    listed.write_text("ko\n", encoding="utf-8")
    grammar = REPO / "src" / "treewright" / "data" / "examples" / "astronomers.pcfg"
    text = tmp_path / "text.txt"
    text.write_text("astronomers saw stars\n", encoding="utf-8")
    assert main(["export", str(grammar), "--to", "brackets", "--corpus", str(text),
                 "--out", str(tmp_path / "out.txt"), "--function-words", str(listed)]) == 1
    assert "--function-words changes the heads of --to conllu" in capsys.readouterr().err
    assert not (tmp_path / "out.txt").exists()
