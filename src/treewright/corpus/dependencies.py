"""CoNLL-U sentences as constituency trees: each word's subtree yield becomes a constituent.

Heads are 1-based word indices with 0 for the root, as in the CoNLL-U HEAD column, given as a
list `heads[i]` for word i+1. In a projective tree every subtree yield is a contiguous span and the
spans nest, so they form a constituency tree over the words (common practice).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Iterable, Iterator

from conllu.exceptions import ParseException
from conllu.parser import DEFAULT_FIELDS, parse_line

from treewright.errors import InputError
from treewright.trees import Tree, tree_from_spans


@dataclass
class DependencySentence:
    """The syntactic words of one CoNLL-U sentence (multiword-token lines and empty nodes
    left out), with the line where its block starts and its `# sent_id` comment, if any.

    heads: None for a sentence that is only tokenized (every HEAD is `_`).
    joined: per word, True when it is written joined to the word before it, in one orthographic
        word: both lie in one multiword token (a range line such as `3-4`), or the token before
        it has `SpaceAfter=No` in MISC (the CoNLL-U conventions for the text as written).
    contracted: per word, the written form of the multiword token it lies in when that token's
        words run together do not spell it (a contraction: `au` over `à` and `le`), else None;
        None when no multiword token of the sentence is contracted.
    in_token: per word, True when it lies in one multiword token with the word before it (so
        that the two stay one written word when a word between them, such as a quote inside
        `ב"פולחן`, is removed).
    """
    words: list[str]
    upos: list[str]
    heads: list[int] | None
    line: int
    sent_id: str | None = None
    joined: list[bool] | None = None
    contracted: list[str | None] | None = None
    in_token: list[bool] | None = None


def _children(heads: list[int]) -> list[list[int]]:
    """children[h] lists the dependents of h (0 = root), in word order."""
    children: list[list[int]] = [[] for _ in range(len(heads) + 1)]
    for dep, head in enumerate(heads, start=1):
        children[head].append(dep)
    return children


def check_tree(heads: list[int]) -> str | None:
    """None if `heads` is a tree rooted at 0, else a sentence saying what is wrong."""
    found = tree_problem(heads)
    return None if found is None else found[1]


def tree_problem(heads: list[int]) -> tuple[int, str] | None:
    """None if `heads` is a tree rooted at 0, else the word (1-based) to point at and a sentence
    saying what is wrong: the word whose head is out of range or itself, or the first word of a
    cycle."""
    n = len(heads)
    for dep, head in enumerate(heads, start=1):
        if not 0 <= head <= n:
            return dep, f"word {dep} has head {head}, outside 0..{n}"
        if head == dep:
            return dep, f"word {dep} is its own head"
    # Every word must reach the root; follow heads with a visited mark (no recursion).
    state = [0] * (n + 1)  # 0 unseen, 1 on the current path, 2 reaches the root
    state[0] = 2
    for start in range(1, n + 1):
        path = []
        node = start
        while state[node] == 0:
            state[node] = 1
            path.append(node)
            node = heads[node - 1]
        if state[node] == 1:
            cycle = sorted(path[path.index(node):])
            return cycle[0], f"the heads of words {cycle} form a cycle"
        for p in path:
            state[p] = 2
    return None


def subtree_spans(heads: list[int]) -> list[tuple[int, int]]:
    """For each word (0-based i), the (min, max+1) of its subtree yield, 0-based half-open."""
    n = len(heads)
    lo = list(range(n + 1))
    hi = list(range(n + 1))
    children = _children(heads)
    order, stack = [], [0]
    while stack:  # pre-order from the root; reversed, children come before their heads
        node = stack.pop()
        order.append(node)
        stack.extend(children[node])
    for node in reversed(order):
        for child in children[node]:
            lo[node] = min(lo[node], lo[child])
            hi[node] = max(hi[node], hi[child])
    return [(lo[w] - 1, hi[w]) for w in range(1, n + 1)]


def _preorder(children: list[list[int]]) -> list[int]:
    order, stack = [], [0]
    while stack:
        node = stack.pop()
        order.append(node)
        stack.extend(reversed(children[node]))
    return order


def nonprojective_arcs(heads: list[int]) -> list[int]:
    """Dependents (1-based) whose arc is non-projective: some word strictly between head and
    dependent is not dominated by the head. Empty for a projective tree; the root 0 stands left
    of every word and dominates all of them."""
    n = len(heads)
    children = _children(heads)
    # Pre-order entry numbers and subtree sizes: h dominates w iff
    # enter[h] <= enter[w] < enter[h] + size[h].
    order = _preorder(children)
    enter = [0] * (n + 1)
    for rank, node in enumerate(order):
        enter[node] = rank
    size = [1] * (n + 1)
    for node in reversed(order):
        for child in children[node]:
            size[node] += size[child]
    bad = []
    for dep, head in enumerate(heads, start=1):
        low, high = enter[head], enter[head] + size[head]
        if any(not low <= enter[w] < high for w in range(min(head, dep) + 1, max(head, dep))):
            bad.append(dep)
    return bad


def lift_to_projective(heads: list[int]) -> list[int]:
    """A projective tree made from `heads` by lifting: while some arc is non-projective, the
    shortest one is re-attached to its head's head (Nivre and Nilsson 2005, "Pseudo-Projective
    Dependency Parsing"). Arcs from the root are always projective, so this ends."""
    heads = list(heads)
    while True:
        bad = nonprojective_arcs(heads)
        if not bad:
            return heads
        dep = min(bad, key=lambda d: (abs(heads[d - 1] - d), d))
        heads[dep - 1] = heads[heads[dep - 1] - 1]


def dependency_to_tree(words: list[str], upos: list[str], heads: list[int],
                       phrase_labels: str = "upos", fixed_label: str = "X") -> Tree:
    """The constituency tree whose constituents are the subtree yields of a projective tree.

    Each word is a preterminal labeled by its UPOS; each word with dependents also heads a
    phrase over its yield, labeled by its UPOS (`phrase_labels="upos"`) or `fixed_label`. When
    several words attach to the root, a `fixed_label` phrase spans the whole sentence.
    Raises ValueError if `heads` is not projective (the spans would cross).
    """
    n = len(words)
    spans: list[tuple[int, int, str]] = [(i, i + 1, upos[i]) for i in range(n)]
    for i, (lo, hi) in enumerate(subtree_spans(heads)):
        if hi - lo > 1:
            spans.append((lo, hi, upos[i] if phrase_labels == "upos" else fixed_label))
    if not any(s[0] == 0 and s[1] == n and s[1] - s[0] > 1 for s in spans) and n > 1:
        spans.append((0, n, fixed_label))
    return tree_from_spans(words, spans)


def iter_conllu_blocks(lines: Iterable[tuple[int, str]], path: str
                       ) -> Iterator[DependencySentence | InputError]:
    """Yield each sentence block of a CoNLL-U file, or an InputError for a malformed one.

    Multiword-token lines (ids like 3-4) and empty nodes (ids like 5.1) are left out; the
    syntactic words remain, and the range lines and `SpaceAfter=No` tell which words were
    written joined (`DependencySentence.joined`). Ids must run 1..n in order; heads must form a
    tree, or be `_` on every word (text that is only tokenized).
    """
    block: list[tuple[int, str]] = []
    for number, text in lines:
        if text.strip():
            block.append((number, text))
        elif block:
            yield _parse_block(block, path)
            block = []
    if block:
        yield _parse_block(block, path)


def _parse_block(block: list[tuple[int, str]], path: str) -> DependencySentence | InputError:
    words: list[str] = []
    upos: list[str] = []
    heads: list[int] = []
    joined: list[bool] = []
    first = block[0][0]
    sent_id = None
    glue_next = False           # the token before the next word had SpaceAfter=No
    word_range = (0, 0)         # (first, last) word ids of the multiword token being read
    range_glue = False          # that token had SpaceAfter=No
    range_form = ""             # that token's written form
    contracted: list[str | None] = []
    in_token: list[bool] = []
    word_lines: list[int] = []
    for number, text in block:
        if text.startswith("#"):
            # The CoNLL-U comment that names the sentence: "# sent_id = <id>".
            key, sep, value = text[1:].partition("=")
            if sep and key.strip() == "sent_id" and value.strip():
                sent_id = value.strip()
            continue
        fields = text.split("\t")
        if len(fields) != len(DEFAULT_FIELDS):
            return InputError(f"a CoNLL-U word line needs {len(DEFAULT_FIELDS)} tab-separated "
                              f"fields, found {len(fields)}", path, number, 1)
        try:
            token = parse_line(text, DEFAULT_FIELDS)
        except ParseException as err:
            return InputError(f"cannot read this CoNLL-U line ({err})", path, number, 1)
        ident = token["id"]
        no_space = (token["misc"] or {}).get("SpaceAfter") == "No"
        if isinstance(ident, tuple) and len(ident) == 3 and ident[1] == "-":
            # A multiword token: its words are one orthographic word; its MISC speaks for the
            # space after the whole token, that is after its last word.
            word_range = (int(ident[0]), int(ident[2]))
            range_glue = no_space
            range_form = token["form"]
            continue
        if not isinstance(ident, int):
            continue  # an empty node: not a syntactic word
        if ident != len(words) + 1:
            return InputError(f"word id {ident} out of order (expected {len(words) + 1})",
                              path, number, 1)
        inside = word_range[0] < ident <= word_range[1]
        joined.append(glue_next or inside)
        in_token.append(inside)
        glue_next = range_glue if ident == word_range[1] else (
            no_space and not word_range[0] <= ident < word_range[1])
        words.append(token["form"])
        upos.append(token["upos"] or "_")
        heads.append(token["head"])
        word_lines.append(number)
        contracted.append(range_form if word_range[0] <= ident <= word_range[1] else None)
        if ident == word_range[1] and 1 <= word_range[0] <= word_range[1]:
            _mark_contraction(contracted, words, word_range[1] - word_range[0] + 1)
    if not words:
        return InputError("a CoNLL-U block with comments but no words", path, first, 1)
    contracted_or_none = contracted if any(c is not None for c in contracted) else None
    missing = [i for i, h in enumerate(heads) if not isinstance(h, int)]
    if len(missing) == len(heads):
        return DependencySentence(words, upos, None, first, sent_id, joined,
                                  contracted_or_none, in_token)
    if missing:
        return InputError(f"word {missing[0] + 1} has no head (`_`), but other words have one; "
                          "give every word a head, or none for text that is only tokenized",
                          path, word_lines[missing[0]], 1)
    problem = tree_problem(heads)
    if problem is not None:   # named at the line of the word it concerns
        word, what = problem
        return InputError(f"not a dependency tree: {what}", path, word_lines[word - 1], 1)
    return DependencySentence(words, upos, heads, first, sent_id, joined, contracted_or_none,
                              in_token)


def _mark_contraction(contracted: list[str | None], words: list[str], count: int) -> None:
    """Keep the written form on the last `count` words (one multiword token, just read) only
    when their forms run together do not spell it, as written or lowercased (`Velo` over `ve`
    and `lo` is spelled by them); else set them to None."""
    form = contracted[-1] or ""
    spelled = "".join(words[-count:])
    if spelled == form or spelled.lower() == form.lower():
        contracted[-count:] = [None] * count
