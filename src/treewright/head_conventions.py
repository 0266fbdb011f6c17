"""Induced heads in the content-head convention: function words as dependents.

A lexicalized model heads each phrase by whichever word best predicts how the phrase is used
(`params.lexicalized`). Where a phrase is closed or opened by a function word, such as an
adposition, a determiner or a subordinating conjunction, that word is often the better
predictor, so the model heads the phrase by it. Universal Dependencies heads the same phrase by
its content word and attaches the function word to it (de Marneffe et al. 2021, "Universal
Dependencies", Computational Linguistics 47(2): the relations case, det, mark, aux, cop, cc and
punct). Raw text cannot say which convention a treebank follows, but a short list of the
language's function words can: `content_heads` goes up the model's own derivation and, where a
listed word heads a phrase whose other part is headed by a content word, gives the phrase to
that content word instead, as conversions between the two conventions do (common practice in
treebank conversion).

`read_function_words` reads the list: a word file, or `ud-function` for the function-word tags
of Universal Dependencies (`corpus.UD_FUNCTION_TAGS`; a model trained on tags). Punctuation, as
`evaluate` recognizes it by default, always counts as a function word: it attaches to its
clause's head in Universal Dependencies and never heads.
"""

from __future__ import annotations

from pathlib import Path
from typing import Iterable, Sequence

from treewright.corpus import UD_FUNCTION, UD_FUNCTION_TAGS, iter_word_list
from treewright.errors import InputError
from treewright.evaluation.brackets import DEFAULT_PUNCTUATION_TAGS, DEFAULT_PUNCTUATION_TOKENS
from treewright.trees import Tree

# Words and tags that always count as function words: punctuation as `evaluate` knows it.
PUNCTUATION = DEFAULT_PUNCTUATION_TOKENS | DEFAULT_PUNCTUATION_TAGS


def read_function_words(source: str | Path) -> frozenset[str]:
    """The function words `source` names, with punctuation (`PUNCTUATION`) added: `ud-function`
    for `UD_FUNCTION_TAGS`, else a file of one word per line as written (blank lines and lines
    starting with # skipped). InputError naming the line for a line of two or more fields, and
    for a file that lists no word."""
    if str(source) == UD_FUNCTION:
        return frozenset(UD_FUNCTION_TAGS) | PUNCTUATION
    words = set()
    for number, fields, line in iter_word_list(source):
        if len(fields) > 1:
            raise InputError(f"one function word per line, found {len(fields)} fields: "
                             f"{line.strip()!r}", path=str(source), line=number)
        words.add(fields[0])
    if not words:
        raise InputError("lists no words (every line is blank or a comment)", path=str(source))
    return frozenset(words) | PUNCTUATION


def content_heads(tree: Tree, heads: Sequence[int], function: Sequence[bool]) -> list[int]:
    """`heads` (per word, its head's 1-based position, 0 for the root), given by the derivation
    `tree` (a binary tree over the words, unary chains allowed, such as a lexicalized parse's),
    with function words made dependents of content words: bottom-up over the derivation's
    binary nodes, where the head child's head word is a function word (`function[k]`) and the
    other child's is not, the other child heads the node instead, and the function word
    depends on it. So every dependent the function word took at that node or above moves to
    the content word, while a phrase of function words alone (a function word made of several
    words) keeps its own head and attaches to the content word whole, and a stack of function
    words over one content word (two adpositions on a noun) ends below it. The head child of a
    node is the one whose head word's head (in `heads`) lies outside the node. ValueError when
    the tree is not binary over len(heads) words or `heads` are not a tree it derives."""
    n = len(heads)
    if len(function) != n:
        raise ValueError(f"{n} heads but {len(function)} function-word flags")
    words = len(tree.leaves())
    if words != n:
        raise ValueError(f"the tree has {words} words, the heads {n}")
    out = [0] * n
    position = 0
    # Post-order without recursion (a long sentence's tree may be deep): a frame is
    # [node, results of the children done so far]; a result is (start, end, head as given,
    # head after the conversion), 1-based heads.
    stack: list[list] = [[tree, []]]
    result: tuple[int, int, int, int] | None = None
    while stack:
        node, done = stack[-1]
        if isinstance(node, str) or node.is_preterminal():
            position += 1
            result = (position - 1, position, position, position)
        elif len(done) < len(node.children):
            stack.append([node.children[len(done)], []])
            continue
        elif len(done) == 1:
            result = done[0]
        elif len(done) == 2:
            (start, _, left_given, left), (_, end, right_given, right) = done
            left_heads = not start < heads[left_given - 1] <= end
            right_heads = not start < heads[right_given - 1] <= end
            if left_heads == right_heads:
                raise ValueError(f"the heads do not derive from the tree: words {start + 1}-"
                                 f"{end} have {2 if left_heads else 0} heads outside")
            given, head, dependent = (left_given, left, right) if left_heads else \
                (right_given, right, left)
            if function[head - 1] and not function[dependent - 1]:
                head, dependent = dependent, head
            out[dependent - 1] = head
            result = (start, end, given, head)
        else:
            raise ValueError(f"a node with {len(node.children)} children: not a binary tree")
        stack.pop()
        if stack:
            stack[-1][1].append(result)
    assert result is not None
    out[result[3] - 1] = 0
    return out


def content_parse_heads(sentences: Iterable[Sequence[str]], parses: Iterable,
                        function_words: frozenset[str]) -> list[list[int] | None]:
    """`content_heads` of lexicalized parses (`decode.HeadedParse`: `tree` and `heads`) of
    `sentences`, the words in `function_words` as function words; None for a sentence without
    a parse."""
    return [content_heads(p.tree, p.heads, [w in function_words for w in words])
            if p.heads else None for words, p in zip(sentences, parses)]
