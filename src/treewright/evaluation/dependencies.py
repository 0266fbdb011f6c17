"""Attachment scoring: directed, undirected and neutral-edge-direction accuracy of predicted heads
against gold heads, beside the left-chain and right-chain baselines, on the same sentences and
words.

Heads are given per word as in the CoNLL-U HEAD column: word k's head is a 1-based word index,
0 for the root. `evaluate_attachment(pred, gold)` decides once per gold sentence which words are
punctuation (by the punctuation options of `BracketConventions`, as the bracket evaluation
decides it) and takes them out of both trees, as brackets are recomputed without them: they are
not scored, and a head that is punctuation passes to the first word up its chain of heads that
is not (`past_punctuation`). The model and both chains are scored on exactly the words left.

Directed accuracy counts a word when its predicted head is its gold head. Undirected accuracy
counts it when its predicted arc joins the same two words as some gold arc, in either direction
(Klein and Manning 2004, "Corpus-Based Induction of Syntactic Structure: Models of Dependency
and Constituency", report both); an arc to the root joins the word to 0, so it matches only a
gold arc to the root. NED, neutral edge direction (Schwartz, Abend, Reichart & Rappoport 2011,
"Neutralizing Linguistically Problematic Annotations in Unsupervised Dependency Parsing
Evaluation"), counts a word y whose predicted head is x when x is y's gold head, when y is x's
gold head (the arc reversed), or when x is y's gold grandparent, with the root as node 0 (x = 0
and y's gold head a root word counts). It forgives what a change of annotation convention moves,
such as which of a function word and its content word heads their phrase, which the text alone
may not decide. Every score is pooled over words: correct words / scored words.

Scores are fractions in [0, 1] in `to_dict()` and percentages in `format_table()`.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Sequence

from treewright.errors import InputError
from treewright.evaluation.brackets import BracketConventions, word_difference

MODEL = "model"
BASELINES = ("left_chain", "right_chain")
SYSTEM_TITLES = {MODEL: "model", "left_chain": "left chain", "right_chain": "right chain"}


@dataclass(frozen=True)
class Dependencies:
    """One sentence: its words, the head of each (1-based, 0 = root; shape (n,)), optionally its
    tags (shape (n,)), and the 1-based line where it starts in its file (None: messages use the
    sentence's position instead). `heads` None: a prediction without a parse."""

    words: tuple[str, ...]
    heads: tuple[int, ...] | None
    tags: tuple[str, ...] | None = None
    line: int | None = None


@dataclass(frozen=True)
class AttachmentScores:
    """Directed, undirected and NED attachment accuracy of one system over the scored words.

    directed, undirected, ned: correct / words, None when no word was scored.
    """

    directed: float | None
    undirected: float | None
    directed_correct: int
    undirected_correct: int
    words: int
    ned: float | None
    ned_correct: int


@dataclass
class DependencyEvaluation:
    """The result of `evaluate_attachment`.

    systems: "model" (when predictions were given), "left_chain" and "right_chain", each an
        `AttachmentScores` over the same words.
    counts: sentences read, left out (and why), evaluated; words scored; punctuation words not
        scored; scored words whose gold head is punctuation; predictions without a parse.
    conventions: every counting rule, in words and values.
    """

    systems: dict[str, AttachmentScores]
    counts: dict[str, int]
    conventions: dict[str, object]

    def to_dict(self) -> dict:
        """Plain lists, dicts, strings and numbers only: ready for json.dumps."""
        return {"systems": {name: asdict(s) for name, s in self.systems.items()},
                "counts": dict(self.counts), "conventions": dict(self.conventions)}

    def format_table(self) -> str:
        """A plain-text report: the systems side by side, then counts and conventions."""
        c = self.counts
        width = max(len(SYSTEM_TITLES[n]) for n in self.systems) + 2
        lines = [f"Attachment on {c['words_scored']} words of {c['evaluated']} of {c['read']} "
                 "sentences (scores in %)", "",
                 "system".ljust(width) + "directed".rjust(11) + "undirected".rjust(11)
                 + "NED".rjust(11)]
        for name, s in self.systems.items():
            lines.append(SYSTEM_TITLES[name].ljust(width) + _pct(s.directed).rjust(11)
                         + _pct(s.undirected).rjust(11) + _pct(s.ned).rjust(11))
        lines += ["", "Counts"] + [f"  {k}: {v}" for k, v in self.counts.items()]
        lines += ["", "Conventions"] + [f"  {k}: {v}" for k, v in self.conventions.items()]
        return "\n".join(lines)


def _pct(value: float | None) -> str:
    return "-" if value is None else f"{100 * value:.1f}"


def evaluate_attachment(pred: Sequence[Dependencies | Sequence[int] | None] | None,
                        gold: Sequence[Dependencies],
                        conventions: BracketConventions | None = None, *,
                        pred_path: str | None = None,
                        gold_path: str | None = None) -> DependencyEvaluation:
    """Score predicted heads against gold heads, beside the chain baselines, on the same words.

    pred: per sentence, a `Dependencies` or a plain list of heads, or None for a sentence
        without a parse (every scored word counts wrong). The heads cover either every gold
        word (shape (n,), indices over the whole sentence) or, when punctuation is removed,
        only the words left (shape (m,), indices over those words, as for a model that never
        saw the punctuation); a `Dependencies`' words must be the gold words or those left.
        `pred` itself may be None to report the baselines alone.
    gold: per sentence, a `Dependencies` with heads; its tags (or, without tags, its words)
        decide which words are punctuation.
    conventions: the punctuation options (`remove_punctuation`, `punctuation_tags`,
        `punctuation_tokens`) and `max_length` are read; the bracket-only fields are not.
    pred_path, gold_path: where the sentences came from, only for error messages.
    Raises InputError naming the file and line (the sentence's `line`, else its 1-based
    position) when the sides differ in sentence count, words or word count, or when a head lies
    outside its sentence or is the word itself. Predicted heads need not form a tree.
    """
    conv = conventions or BracketConventions()
    punctuation = [punctuation_marks(g, conv) if conv.remove_punctuation
                   else [False] * len(g.words) for g in gold]
    pred_heads = None if pred is None else _check_inputs(pred, gold, punctuation, pred_path,
                                                         gold_path)
    counts = {"read": len(gold), "empty_after_punctuation": 0, "longer_than_max_length": 0,
              "evaluated": 0, "words_scored": 0, "punctuation_words_not_scored": 0,
              "gold_heads_past_punctuation": 0, "predicted_heads_past_punctuation": 0,
              "unparsed_predictions": 0}
    systems = [MODEL, *BASELINES] if pred_heads is not None else list(BASELINES)
    directed = dict.fromkeys(systems, 0)
    undirected = dict.fromkeys(systems, 0)
    ned = dict.fromkeys(systems, 0)
    for index, (g, marks) in enumerate(zip(gold, punctuation)):
        scored = [k for k, p in enumerate(marks, start=1) if not p]
        counts["punctuation_words_not_scored"] += len(g.words) - len(scored)
        if not scored:
            counts["empty_after_punctuation"] += 1
            continue
        if conv.max_length is not None and len(scored) > conv.max_length:
            counts["longer_than_max_length"] += 1
            continue
        counts["evaluated"] += 1
        counts["words_scored"] += len(scored)
        truth = past_punctuation(g.heads, marks)
        counts["gold_heads_past_punctuation"] += sum(truth[k - 1] != g.heads[k - 1]
                                                     for k in scored)
        candidates = {"left_chain": left_chain(scored, len(g.words)),
                      "right_chain": right_chain(scored, len(g.words))}
        if pred_heads is not None:
            mine = pred_heads[index]
            counts["unparsed_predictions"] += mine is None
            if mine is not None:
                candidates[MODEL] = past_punctuation(mine, marks)
                counts["predicted_heads_past_punctuation"] += sum(
                    candidates[MODEL][k - 1] != mine[k - 1] for k in scored)
        for name, heads in candidates.items():
            for k in scored:
                head = heads[k - 1]
                directed[name] += head == truth[k - 1]
                # The arc {k, head} read without direction: k's own gold arc, or the gold arc
                # of `head` coming back to k (never for the root, which has no gold arc).
                reversed_ = head is not None and head != 0 and truth[head - 1] == k
                undirected[name] += head == truth[k - 1] or reversed_
                # NED adds the gold grandparent (the root, 0, when k's gold head is a root).
                parent = truth[k - 1]
                ned[name] += head == parent or reversed_ or (
                    head is not None and bool(parent) and head == truth[parent - 1])
    words = counts["words_scored"]
    return DependencyEvaluation(
        {name: AttachmentScores(directed[name] / words if words else None,
                                undirected[name] / words if words else None,
                                directed[name], undirected[name], words,
                                ned[name] / words if words else None, ned[name])
         for name in systems},
        counts, _describe(conv))


def past_punctuation(heads: Sequence[int], punctuation: Sequence[bool]) -> list[int | None]:
    """Heads (shape (n,)) with the punctuation words taken out of the tree: a head that is a
    punctuation word is replaced by the first word up its chain of heads that is not (0 when
    the chain reaches the root; None when it loops among punctuation words, possible only in a
    prediction that is not a tree). Entries of punctuation words are carried along unused."""
    out: list[int | None] = []
    for head in heads:
        seen = set()
        while head and punctuation[head - 1]:
            if head in seen:
                head = None
                break
            seen.add(head)
            head = heads[head - 1]
        out.append(head)
    return out


def left_chain(scored: Sequence[int], n: int) -> list[int]:
    """Heads (shape (n,)) of the left chain over the `scored` words (1-based, increasing): each
    one's head is the scored word before it, the first scored word is the root (head 0). Words
    not scored get head 0 (they are never counted)."""
    heads = [0] * n
    for before, word in zip(scored, scored[1:]):
        heads[word - 1] = before
    return heads


def right_chain(scored: Sequence[int], n: int) -> list[int]:
    """Heads (shape (n,)) of the right chain over the `scored` words (1-based, increasing): each
    one's head is the scored word after it, the last scored word is the root (head 0). Words
    not scored get head 0 (they are never counted)."""
    heads = [0] * n
    for word, after in zip(scored, scored[1:]):
        heads[word - 1] = after
    return heads


def punctuation_marks(gold: Dependencies, conv: BracketConventions) -> list[bool]:
    """Per word, whether it is punctuation: by the gold tags when there are any, else by the
    tokens (as `evaluate_brackets` decides)."""
    if gold.tags is not None:
        return [tag in conv.punctuation_tags for tag in gold.tags]
    return [word in conv.punctuation_tokens for word in gold.words]


def _check_inputs(pred: Sequence[Dependencies | Sequence[int] | None],
                  gold: Sequence[Dependencies], punctuation: list[list[bool]],
                  pred_path: str | None, gold_path: str | None) -> list[tuple[int, ...] | None]:
    """Every predicted sentence's heads over all its gold words (None: no parse), after
    checking both sides; heads given over the words left without punctuation are mapped back
    to whole-sentence indices."""
    path = pred_path if pred_path is not None else gold_path
    against = f" (gold: {gold_path})" if gold_path is not None and pred_path is not None else ""

    def where(sentence, index):
        return sentence.line if isinstance(sentence, Dependencies) and sentence.line else index + 1

    if len(pred) != len(gold):
        first = min(len(pred), len(gold))
        longer, side_path = (pred, path) if len(pred) > len(gold) else (gold, gold_path)
        raise InputError(f"sentence {first + 1}: predictions have {len(pred)} sentences, gold has "
                         f"{len(gold)}{against}", path=side_path, line=where(longer[first], first))
    out: list[tuple[int, ...] | None] = []
    for index, (p, g, marks) in enumerate(zip(pred, gold, punctuation)):
        n = len(g.words)
        if g.heads is None:
            raise InputError(f"sentence {index + 1}: gold has no heads", path=gold_path,
                             line=where(g, index))
        _check_heads(g.heads, n, f"sentence {index + 1}: gold", gold_path, where(g, index))
        if g.tags is not None and len(g.tags) != n:
            raise InputError(f"sentence {index + 1}: gold has {len(g.tags)} tags for {n} words",
                             path=gold_path, line=where(g, index))
        kept = [k for k, mark in enumerate(marks, start=1) if not mark]
        kept_words = tuple(g.words[k - 1] for k in kept)
        if isinstance(p, Dependencies):
            if p.words != g.words and p.words != kept_words:
                what = word_difference(p.words, g.words)
                if len(kept) != n:
                    what += f"; without punctuation, {word_difference(p.words, kept_words)}"
                raise InputError(f"sentence {index + 1}: {what}{against}", path=path,
                                 line=where(p, index))
            heads = p.heads
        else:
            heads = p
        if heads is not None:
            heads = tuple(heads)
            if len(heads) not in (n, len(kept)):
                without = f" ({len(kept)} without punctuation)" if len(kept) != n else ""
                raise InputError(f"sentence {index + 1}: {len(heads)} predicted heads for {n} "
                                 f"gold words{without}{against}", path=path, line=where(p, index))
            _check_heads(heads, len(heads), f"sentence {index + 1}: predicted", path,
                         where(p, index))
            if len(heads) != n:
                # Over the words left without punctuation: back to whole-sentence indices, the
                # punctuation words (never scored) attached to the root.
                full = [0] * n
                for k, head in zip(kept, heads):
                    full[k - 1] = kept[head - 1] if head else 0
                heads = tuple(full)
        out.append(heads)
    return out


def _check_heads(heads: Sequence[int], n: int, what: str, path: str | None, line: int) -> None:
    for word, head in enumerate(heads, start=1):
        if not isinstance(head, int) or isinstance(head, bool) or not 0 <= head <= n:
            raise InputError(f"{what} head of word {word} is {head!r}, outside 0..{n}",
                             path=path, line=line)
        if head == word:
            raise InputError(f"{what} word {word} is its own head", path=path, line=line)




def _describe(conv: BracketConventions) -> dict[str, object]:
    return {
        "heads": "per word, a 1-based word index, 0 for the root (the CoNLL-U HEAD column)",
        "directed": "a scored word counts when its predicted head is its gold head",
        "undirected": ("a scored word counts when its predicted arc joins the same two words as a "
                       "gold arc in either direction; an arc to the root matches only a gold arc "
                       "to the root"),
        "ned": ("neutral edge direction (Schwartz, Abend, Reichart & Rappoport 2011): a scored "
                "word counts when its predicted head is its gold head, a word whose gold head "
                "it is, or its gold grandparent (the root when its gold head is a root word)"),
        "accuracy": "pooled over words: correct scored words / scored words",
        "punctuation": ("taken out of both trees before scoring, as for brackets: punctuation "
                        "words are not scored, and heads keep their indices over the whole "
                        "sentence; decided on the gold sentence, by its tags when it has them, "
                        "else by its tokens. Predictions may cover every word or only the words "
                        "left without punctuation" if conv.remove_punctuation
                        else "scored like every other word"),
        "punctuation_head": ("a head that is a punctuation word, gold or predicted, is replaced "
                             "by the first word up its chain of heads that is not punctuation "
                             "(the root if none): the tree with the punctuation taken out "
                             "(common practice where punctuation is removed for unsupervised "
                             "dependency parsing; from memory)"
                             if conv.remove_punctuation else "no word is punctuation"),
        "punctuation_tags": sorted(conv.punctuation_tags),
        "punctuation_tokens": sorted(conv.punctuation_tokens),
        "max_length": conv.max_length,
        "length": "scored words (after punctuation is set aside)",
        "left_chain": ("each scored word's head is the scored word before it (punctuation "
                       "skipped); the first scored word is the root"),
        "right_chain": ("each scored word's head is the scored word after it (punctuation "
                        "skipped); the last scored word is the root"),
        "unparsed": ("a predicted sentence without heads counts every scored word wrong, and so "
                     "does a predicted head whose chain loops among punctuation words"),
    }
