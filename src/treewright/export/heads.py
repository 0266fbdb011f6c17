"""CoNLL-U with predicted heads: the HEAD column filled from a list of heads per sentence.

Heads are given per sentence as in the CoNLL-U HEAD column: word k's head is a 1-based word
index, 0 for the root; None for a sentence without a parse (its HEAD stays `_`). DEPREL is
written `_` (unknown: the heads come without relation names).

- `fill_heads_conllu(path, heads)`: the input was CoNLL-U (gold, or text that is only
  tokenized). Every line is written back as it was read (comments, multiword-token lines, empty
  nodes, blank lines, and on each word line every column but HEAD and DEPREL), so nothing of the
  user's file is lost; only HEAD and DEPREL of the syntactic words change. DEPS, the enhanced
  graph, is the input's and is kept as it is. `export --to conllu` of a CoNLL-U corpus uses it
  too, with a tag column, relation names and comments of its own
  (`export.parses.fill_parsed_conllu`).
- `heads_to_conllu(sentences, heads)`: the input was words; ID, FORM and HEAD are filled, every
  other column is `_`, with `# sent_id` (when given) and `# text` comments.

Both check that every sentence gets one head per word and that the heads form a tree rooted at
0, as the CoNLL-U standard asks, so that the file reads back (`treewright.corpus`); a mismatch
raises InputError naming the file and the line where the sentence starts.
"""

from __future__ import annotations

import os
from typing import Sequence

from treewright.corpus import check_tree, iter_conllu_blocks, iter_lines
from treewright.errors import InputError

HEAD, DEPREL = 6, 7            # 0-based columns of a CoNLL-U word line
UNKNOWN = "_"


def fill_heads_conllu(path: str | os.PathLike, heads: Sequence[Sequence[int] | None], *,
                      relations: tuple[str, str] | None = None,
                      tags: Sequence[Sequence[str]] | None = None, tag_column: int = 4,
                      comments: Sequence[Sequence[str]] | None = None,
                      replaces: Sequence[str] = ()) -> str:
    """The CoNLL-U file at `path` with HEAD set from `heads` (one entry per sentence block, in
    order; None: no parse, HEAD `_`) and DEPREL `_` on every syntactic word; every other line
    and column as read (see the module docstring). Ends with a blank line.

    relations: (root, other), DEPREL of the word whose head is 0 and of every other word of a
        sentence with heads, instead of `_`.
    tags: per sentence, a tag per syntactic word, written into the 0-based column
        `tag_column` (UPOS 3, XPOS 4).
    comments: per sentence, comment lines ("# key = value") written after the block's own
        comments; an own comment with one of their keys, or with a key in `replaces`, is left
        out (so exporting an export again replaces its comments rather than repeating or
        contradicting them)."""
    name = os.fspath(path)
    starts = []
    for block in iter_conllu_blocks(iter_lines(name), name):
        if isinstance(block, InputError):
            raise block
        starts.append((block.line, len(block.words)))
    if len(heads) != len(starts):
        first = min(len(heads), len(starts))
        line = starts[first][0] if first < len(starts) else starts[-1][0]
        raise InputError(f"{len(heads)} sentences of heads for {len(starts)} sentences in the "
                         f"file; sentence {first + 1} has no partner", path=name, line=line)
    for index, ((line, n), h) in enumerate(zip(starts, heads)):
        _check(h, n, index, name, line)
        if tags is not None and len(tags[index]) != n:
            raise InputError(f"sentence {index + 1}: {len(tags[index])} tags for {n} words",
                             path=name, line=line)
    out: list[str] = []
    sentence, word = -1, 0
    in_block = False
    pending: list[str] = []      # this block's extra comments, written before its first word

    def key(comment: str) -> str:
        return comment[1:].partition("=")[0].strip()

    def replaced(comment: str) -> bool:
        return key(comment) in replaces or any(key(comment) == key(c) for c in pending)

    for _, text in iter_lines(name):
        if not text.strip():
            in_block = False
            out.append(text)
            continue
        if not in_block:
            in_block, sentence, word = True, sentence + 1, 0
            pending = list(comments[sentence]) if comments is not None else []
        if text.startswith("#"):
            if not replaced(text):
                out.append(text)
            continue
        out.extend(pending)
        pending = []
        fields = text.split("\t")
        if not fields[0].isdigit():
            out.append(text)  # a multiword-token range or an empty node: as read
            continue
        mine = heads[sentence]
        fields[HEAD] = UNKNOWN if mine is None else str(mine[word])
        fields[DEPREL] = UNKNOWN if mine is None or relations is None else \
            relations[0] if mine[word] == 0 else relations[1]
        if tags is not None:
            fields[tag_column] = tags[sentence][word]
        word += 1
        out.append("\t".join(fields))
    if out and out[-1].strip():
        out.append("")  # CoNLL-U ends every sentence with a blank line, the last one included
    return "\n".join(out) + "\n"


def heads_to_conllu(sentences: Sequence[Sequence[str]], heads: Sequence[Sequence[int] | None],
                    sent_ids: Sequence[str] | None = None) -> str:
    """CoNLL-U of plain word lists with HEAD from `heads` (None: no parse, HEAD `_`): ID, FORM
    and HEAD filled, every other column `_`; comments `# sent_id` (when `sent_ids` is given) and
    `# text` (the words joined by spaces). Sentences must have at least one word."""
    if len(heads) != len(sentences) or (sent_ids is not None and len(sent_ids) != len(sentences)):
        raise ValueError(f"{len(sentences)} sentences, {len(heads)} lists of heads"
                         + ("" if sent_ids is None else f", {len(sent_ids)} sentence ids"))
    blocks = []
    for index, (words, h) in enumerate(zip(sentences, heads)):
        if not words:
            raise ValueError(f"sentence {index + 1} has no words (a CoNLL-U sentence needs one)")
        bad = next((w for w in words if not w or any(c in w for c in "\t\n\r")), None)
        if bad is not None:
            raise ValueError(f"sentence {index + 1}: the word {bad!r} cannot be a CoNLL-U FORM "
                             "(empty, or with a tab or line break)")
        _check(h, len(words), index, None, None)
        lines = [] if sent_ids is None else [f"# sent_id = {sent_ids[index]}"]
        lines.append(f"# text = {' '.join(words)}")
        for k, form in enumerate(words, start=1):
            row = [str(k), form] + [UNKNOWN] * 8
            row[HEAD] = UNKNOWN if h is None else str(h[k - 1])
            lines.append("\t".join(row))
        blocks.append("\n".join(lines) + "\n")
    return "\n".join(blocks) + "\n"


def _check(heads: Sequence[int] | None, n: int, index: int, path: str | None,
           line: int | None) -> None:
    """InputError (naming `path` and `line`) unless `heads` is None or a tree over n words."""
    if heads is None:
        return
    problem = None
    if len(heads) != n:
        problem = f"{len(heads)} heads for {n} words"
    elif not all(isinstance(h, int) and not isinstance(h, bool) for h in heads):
        problem = "heads must be integers"
    else:
        problem = check_tree(list(heads))
    if problem is not None:
        raise InputError(f"sentence {index + 1}: the predicted heads do not fit: {problem}",
                         path=path, line=line)
