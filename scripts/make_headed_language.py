"""Write the invented head-final and head-initial languages with their true heads, as CoNLL-U.

The languages are those of `scripts/bench_induction.py --data head-final / head-initial`:
head-final is Kethravi, the demo's generating grammar (`scripts/make_demo_data.py`);
head-initial is its mirror, every binary rule's two children swapped (`mirror_grammar` of the
benchmark). Every phrase rule of `make_demo_data.PHRASE_RULES` marks its head child, so each
drawn tree has one true dependency tree: the head word of a phrase is the head word of its
head child, and the head word of the other child depends on it (head percolation, Collins
1999, "Head-Driven Statistical Models for Natural Language Parsing"). Content words head, as
in Universal Dependencies: particles and the final mark depend on the content word of the
phrase they close (see `PHRASE_RULES`). Mirroring a rule keeps its head child, now on the other
side.

In the generating grammar every word is drawn from its tag alone, so no word says anything
about its head, and a head-outward model of the text cannot tell a content head from a
function head. With `--selection S` (0 < S <= 1) the words are drawn again so that they do
(`select_words`): the words of each content tag fall into `SELECTION_CLASSES` classes, and a
content word whose head is a content word takes its head's class with probability S (as a verb
selects the kind of noun it takes), else a class at random; function words and the root's word
keep their draw. The trees and heads stay those drawn without selection, so only the words
change, and the generating grammar is no longer the model of the text.

Sentences are drawn as the benchmark draws them (`treewright.inference.generate` with the same
seed, count and length cap), so with the same flags the test sentences here are the
benchmark's `<order>-test` sentences, word for word. Outputs, per order in <out>/<order>/:

    grammar.pcfg   the generating grammar (the ceiling model; with --selection, only the
                   grammar the trees were drawn from)
    train.txt      raw training sentences, one per line
    train.conllu   the same sentences with their true heads
    test.txt       raw test sentences
    test.conllu    the same sentences with their true heads

CoNLL-U columns: ID, FORM, UPOS (the generating preterminal, so the final mark is PUNCT),
HEAD (the true head), DEPREL (`root`, else the symbol of the dependent's highest phrase, such
as NP or PUNCT: a name from the grammar, not a Universal Dependencies relation); the rest `_`.
Comments: `# sent_id` (<order>-<split>-<k>), `# text`, and `# tree`, the generating tree.

    .venv/bin/python scripts/make_headed_language.py --out runs/headed
    .venv/bin/python scripts/make_headed_language.py --out runs/headed --train-sentences 5000 \\
        --test-sentences 500 --max-words 15 --seed 0      # the benchmark's defaults
    .venv/bin/python scripts/make_headed_language.py --out runs/selective --selection 0.8
"""

from __future__ import annotations

import argparse
import copy
import random
import sys
from pathlib import Path

from treewright.grammar import Grammar, load_grammar
from treewright.inference import generate
from treewright.trees import Tree

SCRIPTS = Path(__file__).resolve().parent
if str(SCRIPTS) not in sys.path:
    sys.path.insert(0, str(SCRIPTS))  # the sibling scripts, when this one is loaded by path

from bench_induction import ORDERS, mirror_grammar  # noqa: E402
from make_demo_data import PHRASE_RULES  # noqa: E402

ROOT_RELATION = "root"
SIDES = ("left", "right")
# Lexical selection (`select_words`): the tags of content words, and how many classes their
# words fall into. Function words (DET, ART, GEN, POST, COMP, SUB, REL) and the final mark keep
# the word their tag drew.
CONTENT_TAGS = ("NAME", "N", "ADJ", "NUM", "ADV", "VT", "VI", "VS")
SELECTION_CLASSES = 4


def head_children(order: str) -> dict[tuple[str, str, str], int]:
    """Per binary rule (lhs, left child, right child) of the order's grammar, the index of its
    head child (0 left, 1 right), from the head marks of `PHRASE_RULES`."""
    if order not in ORDERS:
        raise ValueError(f"order must be one of {ORDERS}, not {order!r}")
    table = {}
    for lhs, left, right, _, head in PHRASE_RULES:
        side = SIDES.index(head)
        if order == "head-initial":
            table[(lhs, right, left)] = 1 - side   # mirrored: the same child, other side
        else:
            table[(lhs, left, right)] = side
    return table


def order_grammar(order: str) -> Grammar:
    """The generating grammar of `order`: the demo grammar, or its mirror."""
    from treewright.demo import demo_data_dir
    grammar = load_grammar(demo_data_dir() / "grammar.pcfg")
    return mirror_grammar(grammar) if order == "head-initial" else grammar


def tree_heads(tree: Tree, table: dict[tuple[str, str, str], int]) -> tuple[list[int], list[str]]:
    """The true dependency tree of a drawn tree: per word, HEAD (1-based, 0 for the root) and
    DEPREL (`root`, or the label of the highest phrase the word heads). Every node must be a
    preterminal over one word or a binary rule listed in `table` (ValueError otherwise)."""
    n = len(tree.leaves())
    heads, relations = [0] * n, [ROOT_RELATION] * n
    position = [0]

    def head_word(node: Tree) -> int:
        if node.is_preterminal():
            position[0] += 1
            return position[0]
        labels = tuple(c.label if isinstance(c, Tree) else None for c in node.children)
        key = (node.label, *labels)
        if key not in table:
            raise ValueError(f"{node.label} -> {' '.join(map(str, labels))} is not a phrase "
                             "rule with a head mark")
        below = [head_word(c) for c in node.children]   # left to right: words in order
        head = below[table[key]]
        other = 1 - table[key]
        heads[below[other] - 1] = head
        relations[below[other] - 1] = labels[other]
        return head

    heads[head_word(tree) - 1] = 0
    return heads, relations


Lexicon = dict[str, list[tuple[list[str], list[float]]]]


def selection_lexicon(grammar: Grammar, classes: int = SELECTION_CLASSES) -> Lexicon:
    """Per content tag, its words in `classes` classes: the k-th most probable word of the tag
    (ties in vocabulary order) is in class k mod `classes`, so every class has frequent and rare
    words. Each class holds its words and their probabilities under the tag."""
    nt = len(grammar.nonterminals)
    out: Lexicon = {}
    for i, tag in enumerate(grammar.preterminals):
        if tag not in CONTENT_TAGS:
            continue
        probs = grammar.lexical[nt + i].double().exp().tolist()
        ranked = sorted((w for w in range(len(probs)) if probs[w] > 0), key=lambda w: -probs[w])
        if len(ranked) < classes:
            raise ValueError(f"{tag} has {len(ranked)} words, fewer than {classes} classes")
        groups: list[tuple[list[str], list[float]]] = [([], []) for _ in range(classes)]
        for rank, w in enumerate(ranked):
            groups[rank % classes][0].append(grammar.vocab.words[w])
            groups[rank % classes][1].append(probs[w])
        out[tag] = groups
    return out


def select_words(tree: Tree, heads: list[int], lexicon: Lexicon, strength: float,
                 rng: random.Random) -> Tree:
    """A copy of `tree` whose content words depend on their heads' words (lexical selection,
    as a verb selects the kind of noun it takes). Every content word (tag in `lexicon`) has a
    class; a content word whose head is a content word is drawn again, heads before their
    dependents: with probability `strength` its class is its head's class, else a class drawn
    uniformly, and the word is drawn from its tag's words of that class in proportion to their
    probabilities under the tag. The root's word and the words under other tags stay as drawn.
    The tree and the heads are unchanged, so `tree_heads` of the copy gives `heads` again."""
    out = copy.deepcopy(tree)
    slots = out.word_slots()
    tags = [node.label for node, _, _ in slots]
    cls_of = {(tag, w): c for tag, groups in lexicon.items()
              for c, (words, _) in enumerate(groups) for w in words}
    cls: list[int | None] = [cls_of.get((t, w)) for t, (_, _, w) in zip(tags, slots)]
    order = [k for k, h in enumerate(heads) if h == 0]
    for k in order:                          # breadth first from the root: heads come first
        order.extend(d for d, h in enumerate(heads) if h == k + 1)
    for k in order:
        h = heads[k] - 1
        if h < 0 or tags[k] not in lexicon or cls[h] is None:
            continue
        groups = lexicon[tags[k]]
        c = cls[h] if rng.random() < strength else rng.randrange(len(groups))
        words, weights = groups[c]
        node, index, _ = slots[k]
        node.children[index] = rng.choices(words, weights=weights)[0]
        cls[k] = c
    return out


def draw_trees(order: str, grammar: Grammar, count: int, max_words: int, seed: int,
               selection: float = 0.0) -> list[Tree]:
    """`count` trees of the order's generating `grammar` (`order_grammar`), drawn under `seed`;
    with `selection` > 0 their content words are drawn again by `select_words` with that
    strength (its own generator, seeded from `seed`, so the trees are those drawn without it)."""
    if not 0 <= selection <= 1:
        raise ValueError(f"the selection strength is a probability, not {selection}")
    trees = generate(grammar, count, seed=seed, max_words=max_words)
    if selection == 0:
        return trees
    table, lexicon = head_children(order), selection_lexicon(grammar)
    rng = random.Random(f"lexical selection {seed}")
    return [select_words(t, tree_heads(t, table)[0], lexicon, selection, rng) for t in trees]


def draw(order: str, train_size: int, test_size: int, max_words: int, seed: int,
         selection: float = 0.0) -> tuple[Grammar, list[Tree], list[Tree]]:
    """The generating grammar and the train and test trees, drawn as
    `bench_induction.generated_data` draws them (same call, same split)."""
    grammar = order_grammar(order)
    trees = draw_trees(order, grammar, train_size + test_size, max_words, seed, selection)
    return grammar, trees[:train_size], trees[train_size:]


def conllu_text(trees: list[Tree], table: dict[tuple[str, str, str], int], prefix: str) -> str:
    """The trees as CoNLL-U with their true heads (see the module docstring)."""
    blocks = []
    for k, tree in enumerate(trees, start=1):
        words = tree.leaves()
        tags = [node.label for node in tree.subtrees() if node.is_preterminal()]
        heads, relations = tree_heads(tree, table)
        lines = [f"# sent_id = {prefix}-{k}", f"# text = {' '.join(words)}",
                 f"# tree = {tree.to_string()}"]
        for i, (word, tag, head, relation) in enumerate(zip(words, tags, heads, relations),
                                                        start=1):
            lines.append(f"{i}\t{word}\t_\t{tag}\t_\t_\t{head}\t{relation}\t_\t_")
        blocks.append("\n".join(lines) + "\n")
    return "\n".join(blocks) + "\n"


def write_order(order: str, out: Path, train_size: int, test_size: int, max_words: int,
                seed: int, selection: float = 0.0) -> dict[str, int]:
    """Write the files of one order into <out>/<order>/; returns the sentence counts."""
    folder = out / order
    folder.mkdir(parents=True, exist_ok=True)
    grammar, train, test = draw(order, train_size, test_size, max_words, seed, selection)
    grammar.save(folder / "grammar.pcfg")
    table = head_children(order)
    for name, trees in (("train", train), ("test", test)):
        (folder / f"{name}.txt").write_text("".join(" ".join(t.leaves()) + "\n" for t in trees),
                                            encoding="utf-8")
        (folder / f"{name}.conllu").write_text(conllu_text(trees, table, f"{order}-{name}"),
                                               encoding="utf-8")
    return {"train": len(train), "test": len(test)}


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0],
                                formatter_class=argparse.RawDescriptionHelpFormatter,
                                epilog="\n".join(__doc__.splitlines()[-4:]))
    p.add_argument("--out", type=Path, required=True, help="output folder")
    p.add_argument("--orders", default=",".join(ORDERS), help="comma list of word orders")
    p.add_argument("--train-sentences", type=int, default=5000)
    p.add_argument("--test-sentences", type=int, default=500)
    p.add_argument("--max-words", type=int, default=15, help="longer draws are drawn again "
                   "(the benchmark passes its --max-length)")
    p.add_argument("--seed", type=int, default=0, help="the benchmark's --data-seed")
    p.add_argument("--selection", type=float, default=0.0, help="strength of lexical "
                   "selection, the benchmark's --selection (0: words from their tags alone)")
    args = p.parse_args(argv)
    orders = [o for o in args.orders.split(",") if o]
    unknown = [o for o in orders if o not in ORDERS]
    if unknown:
        p.error(f"unknown order(s) {', '.join(unknown)}; choose from {', '.join(ORDERS)}")
    for order in orders:
        counts = write_order(order, args.out, args.train_sentences, args.test_sentences,
                             args.max_words, args.seed, args.selection)
        print(f"{order}: {counts['train']} training and {counts['test']} test sentences in "
              f"{args.out / order}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
