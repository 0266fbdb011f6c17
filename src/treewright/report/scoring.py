"""Evaluation from files: predicted trees against gold trees, tags and held-out likelihood;
predicted heads against gold heads (`evaluate_heads_files`).

This wires the metric functions of `treewright.evaluation` to the corpus readers. Brackets use
`evaluate_brackets` (the function training uses for dev F1), so the baselines are always scored
beside the model on the same sentences. Tags are scored when both sides have them; held-out
likelihood when a grammar and a text file are given. Every sentence read is evaluated or
counted: a sentence the reader would skip, or a predicted/gold pair whose words differ, stops
with an `InputError` naming the file and line.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Callable, Sequence

from treewright.budget import DEFAULT_BUDGET_MB
from treewright.corpus import (ReadOptions, Sentence, detect_format, iter_conllu_blocks,
                               iter_lines, read_corpus, read_records)
from treewright.errors import InputError
from treewright.evaluation import (BracketConventions, BracketEvaluation, Bracketing,
                                   Dependencies, DependencyEvaluation, evaluate_attachment,
                                   LikelihoodScores, TagScores, evaluate_brackets, evaluate_tags,
                                   heldout_likelihood, preterminal_labels, words_over_tags)
from treewright.evaluation.brackets import normalization_hint
from treewright.trees import Tree, escape_token
from treewright.word_pieces import written_forms

# The label `treewright parse` writes over a sentence it could not parse.
NOPARSE = "NOPARSE"

# Predicted trees are read as written: induced labels are never function-tag-stripped.
PRED_OPTIONS = ReadOptions(remove_empty=False, strip_function_tags=False)
# Gold CoNLL-U sentences that are not projective are lifted rather than skipped, so that every
# gold sentence stays aligned with its prediction (the count is reported).
GOLD_OPTIONS = ReadOptions(nonprojective="lift")


@dataclass
class EvaluationReport:
    """Everything `treewright evaluate` reports. Notes say why a part is missing."""
    brackets: BracketEvaluation
    tags: TagScores | None = None
    tags_note: str = ""
    likelihood: LikelihoodScores | None = None
    likelihood_note: str = ""
    counts: dict[str, int] = field(default_factory=dict)
    sources: dict[str, str | None] = field(default_factory=dict)

    def to_dict(self) -> dict:
        return {"sources": dict(self.sources), "counts": dict(self.counts),
                "brackets": self.brackets.to_dict(),
                "tags": None if self.tags is None else self.tags.to_dict(),
                "tags_note": self.tags_note,
                "likelihood": None if self.likelihood is None else self.likelihood.to_dict(),
                "likelihood_note": self.likelihood_note}

    def format_table(self) -> str:
        lines = [f"{k}: {v}" for k, v in self.sources.items() if v is not None]
        lines += [f"{k}: {v}" for k, v in self.counts.items()]
        lines += ["", self.brackets.format_table(), "", "Tags"]
        if self.tags is None:
            lines.append(f"  {self.tags_note}")
        else:
            t = self.tags
            lines.append(f"  many-to-one {100 * t.many_to_one:.1f}%, V-measure {100 * t.v_measure:.1f}%"
                         f" (homogeneity {100 * t.homogeneity:.1f}%, completeness "
                         f"{100 * t.completeness:.1f}%), {t.tokens} tokens, {t.induced_labels} "
                         f"induced labels, {t.gold_labels} gold tags")
            if self.tags_note:
                lines.append(f"  {self.tags_note}")
        lines += ["", "Held-out likelihood"]
        if self.likelihood is None:
            lines.append(f"  {self.likelihood_note}")
        else:
            s = self.likelihood
            lines.append(f"  {s.logprob_per_word:.4f} nats per word, perplexity {s.perplexity:.2f}, "
                         f"{s.sentences} sentences, {s.total_words} words, "
                         f"{s.zero_probability_sentences} of probability zero")
            if self.likelihood_note:
                lines.append(f"  {self.likelihood_note}")
        return "\n".join(lines)


def read_all(path: str | Path, fmt: str, options: ReadOptions, role: str) -> list[Sentence]:
    """Every sentence of a file, or InputError naming the first record the reader skipped
    (a skipped record would shift every later sentence against the other file)."""
    corpus = read_corpus(path, fmt, options)
    skipped = corpus.report.skipped
    if skipped or corpus.set_aside:
        first = skipped[0] if skipped else corpus.set_aside[0]
        reason = getattr(first, "reason", "too_long")
        raise InputError(f"{role} sentence cannot be evaluated ({reason})", path=str(path),
                         line=first.line)
    return corpus.sentences


def comparable(tree: Tree) -> Bracketing:
    """The tree's brackets with every word in its bracketed-file form, so that a CoNLL-U "("
    and the "-LRB-" a bracketed file must write for it compare equal (common practice)."""
    b = Bracketing.from_tree(tree)
    return Bracketing(tuple(escape_token(w) for w in b.words), b.spans, b.tags)


def check_aligned(pred: Sequence[Sentence], gold: Sequence[Sentence], pred_path: str,
                  gold_path: str) -> None:
    """InputError at the first line where the predicted and gold sentences differ (words are
    compared in their bracketed-file form, see `comparable`)."""
    for p, g in zip(pred, gold):
        pw, gw = [escape_token(w) for w in p.words], [escape_token(w) for w in g.words]
        if pw != gw:
            position = next((k for k, (a, b) in enumerate(zip(pw, gw)) if a != b),
                            min(len(pw), len(gw)))
            what = (f"word {position + 1} is {pw[position]!r}, gold has "
                    f"{gw[position]!r}{normalization_hint(pw[position], gw[position])}"
                    f"{written_word_hint(pw[position], g, position)}") \
                if position < min(len(pw), len(gw)) \
                else f"{len(pw)} words, gold has {len(gw)}"
            raise InputError(f"predicted sentence differs from gold ({what}; gold: {gold_path}, "
                             f"line {g.line})", path=pred_path, line=p.line)
    if len(pred) != len(gold):
        longer, role, path = (pred, "predicted", pred_path) if len(pred) > len(gold) else \
            (gold, "gold", gold_path)
        extra = longer[min(len(pred), len(gold))]
        raise InputError(f"{len(pred)} predicted sentences but {len(gold)} gold ones; the first "
                         f"{role} sentence without a partner starts here", path=path,
                         line=extra.line)


def written_word_hint(pred_word: str, gold: Sentence, position: int) -> str:
    """When `pred_word` is the gold's written word that starts at word `position` and that the
    gold splits into several words (a CoNLL-U multiword token, or words joined by
    `SpaceAfter=No`), a note saying so and what to do; else ""."""
    if gold.joined is None:
        return ""
    for start, end, form in written_forms(gold.words, gold.joined, gold.contracted):
        if start == position and end - start >= 2 and escape_token(form) == pred_word:
            return (f" (the gold writes {form!r} as the {end - start} words "
                    f"{' + '.join(gold.words[start:end])} and is scored on those: parse the gold "
                    f"file itself, 'treewright parse GRAMMAR {gold.source}', which reads its "
                    f"words, or text tokenized as the gold is)")
    return ""


def _tag_scores(pred: Sequence[Sentence], gold: Sequence[Sentence]):
    """Tag scores over the sentences where both sides tag every word, and a note on the rest."""
    induced, reference, without = [], [], 0
    for p, g in zip(pred, gold):
        try:
            labels = preterminal_labels(p.tree) if p.tree is not None else None
        except ValueError:
            labels = None
        if labels is None or g.tags is None or p.tree.label == NOPARSE:
            without += 1
            continue
        induced.append(labels)
        reference.append(g.tags)
    if not induced:
        return None, "not computed: the predictions or the gold have no preterminals/tags"
    note = f"{without} sentences without tags on one side were left out" if without else ""
    return evaluate_tags(induced, reference), note


def heldout_from_files(grammar_path: str | Path, text_path: str | Path,
                       memory_budget_mb: float | None = DEFAULT_BUDGET_MB,
                       scorer: Callable[[list[list[str]]], list] | None = None
                       ) -> tuple[LikelihoodScores, list[int]]:
    """Per-word log-likelihood and perplexity of a text file under a grammar (text, JSON
    export or run folder), and the lines of the sentences left out because each alone needs
    more than `memory_budget_mb` (see `treewright.budget`). A progress bar runs on a terminal.
    The text is read as the grammar's training run read its corpus (lowercased when it was;
    `corpus.run_read_options`), as `treewright score` reads it: one sentence per non-blank
    line of raw text, per tree of a bracketed file, per block of CoNLL-U (`corpus.read_records`;
    blank lines hold no sentence, a record that gives none stops with its line). `scorer`,
    when given, scores the sentences instead of the grammar file's rules
    (`inference.SentenceScore` per sentence; for a run folder of factored rules, its model's:
    the file is then not read and no budget applies)."""
    from treewright.budget import score_within_budget
    from treewright.corpus import run_read_options
    from treewright.export.source import open_grammar, open_run_record
    from treewright.tracking import terminal_progress

    source = open_grammar(grammar_path) if scorer is None else open_run_record(grammar_path)
    config = (source.training or {}).get("config")
    options = run_read_options(config.get("data") if isinstance(config, dict) else None)
    sentences = read_records(text_path, options=options)
    if scorer is not None:
        scores = scorer([s.tokens for s in sentences])
    else:
        with terminal_progress(len(sentences), "held-out likelihood") as progress:
            scores = score_within_budget(source.grammar, [s.tokens for s in sentences],
                                         memory_budget_mb, progress=progress)
    kept = [s for s in scores if s is not None]
    over = [t.line for t, s in zip(sentences, scores) if s is None]
    return heldout_likelihood([s.logprob for s in kept], [len(s.words) for s in kept],
                              path=str(text_path)), over


def evaluate_files(pred_path: str | Path, gold_path: str | Path,
                   conventions: BracketConventions | None = None, *, gold_format: str = "auto",
                   grammar_path: str | Path | None = None, text_path: str | Path | None = None,
                   tags: bool = True,
                   memory_budget_mb: float | None = DEFAULT_BUDGET_MB,
                   scorer: Callable[[list[list[str]]], list] | None = None) -> EvaluationReport:
    """Score a bracketed-tree file against a gold file (bracketed trees or CoNLL-U).

    grammar_path and text_path, given together, add the held-out likelihood of the text.
    tags: score induced preterminals against gold tags when both sides have them.
    memory_budget_mb: text sentences that alone need more are left out of the likelihood and
    named in `likelihood_note` (see `treewright.budget`).
    scorer: scores the text instead of the grammar file (see `heldout_from_files`).
    """
    pred = read_all(pred_path, "brackets", PRED_OPTIONS, "predicted")
    gold_corpus = read_corpus(gold_path, gold_format, GOLD_OPTIONS)
    if gold_corpus.report.skipped:
        first = gold_corpus.report.skipped[0]
        raise InputError(f"gold sentence cannot be evaluated ({first.reason})",
                         path=str(gold_path), line=first.line)
    gold = gold_corpus.sentences
    missing_tree = next((g for g in gold if g.tree is None), None)
    if missing_tree is not None:
        raise InputError("gold has no tree (give bracketed trees, or CoNLL-U with a head on "
                         "every word)",
                         path=str(gold_path), line=missing_tree.line)
    # Trees parsed from a file of tags (a grammar trained on tags) get the gold words back.
    trees, over_tags = words_over_tags([p.tree for p in pred], [g.words for g in gold],
                                       [g.tags for g in gold])
    pred = [replace(p, tree=t, words=t.leaves()) for p, t in zip(pred, trees)]
    check_aligned(pred, gold, str(pred_path), str(gold_path))
    brackets = evaluate_brackets([comparable(p.tree) for p in pred],
                                 [comparable(g.tree) for g in gold], conventions,
                                 pred_path=str(pred_path), gold_path=str(gold_path))
    counts = {"sentences": len(gold),
              "unparsed_predictions": sum(p.tree.label == NOPARSE for p in pred),
              "gold_projectivised": gold_corpus.report.projectivised}
    if over_tags:
        counts["predictions_over_tags"] = over_tags
    report = EvaluationReport(brackets, counts=counts,
                              sources={"predicted": str(pred_path), "gold": str(gold_path),
                                       "grammar": None if grammar_path is None else str(grammar_path),
                                       "text": None if text_path is None else str(text_path)})
    if tags:
        report.tags, report.tags_note = _tag_scores(pred, gold)
    else:
        report.tags_note = "not requested"
    if grammar_path is not None and text_path is not None:
        report.likelihood, over = heldout_from_files(grammar_path, text_path, memory_budget_mb,
                                                     scorer)
        if over:
            report.likelihood_note = (
                f"{len(over)} sentences of {text_path} over the memory budget of "
                f"{memory_budget_mb:g} MB left out (lines {', '.join(map(str, over[:10]))}"
                f"{', ...' if len(over) > 10 else ''})")
    else:
        report.likelihood_note = "not computed: give both --grammar and --text"
    return report



@dataclass
class AttachmentReport:
    """What `treewright evaluate` reports for predicted heads: attachment accuracy beside the
    chain baselines (`evaluate_attachment`), and where the heads came from."""
    attachment: DependencyEvaluation
    sources: dict[str, str] = field(default_factory=dict)

    def to_dict(self) -> dict:
        return {"sources": dict(self.sources), "attachment": self.attachment.to_dict()}

    def format_table(self) -> str:
        lines = [f"{k}: {v}" for k, v in self.sources.items()]
        return "\n".join(lines + ["", self.attachment.format_table()])


def prediction_format(path: str | Path) -> str:
    """"conllu" for what `corpus.detect_format` calls CoNLL-U (by name or by its word lines),
    or a file whose first non-blank line is a comment (`#`) or holds a tab, else "brackets" (a
    bracketed tree per line). Predictions are one of the two, so a CoNLL-U file with a broken
    first word line is read as CoNLL-U too, and its error names what is wrong with the line."""
    if detect_format(path) == "conllu":
        return "conllu"
    for _, text in iter_lines(path):
        if text.strip():
            return "conllu" if text.startswith("#") or "\t" in text else "brackets"
    return "brackets"


def read_dependencies(path: str | Path, role: str) -> list[Dependencies]:
    """Every sentence block of a CoNLL-U file as `Dependencies` (syntactic words, UPOS, HEAD;
    heads None for a block whose HEAD is `_` throughout), or the file's first InputError.
    Nothing is lifted or removed: attachment is scored on the heads as written."""
    name = str(path)
    out = []
    for block in iter_conllu_blocks(iter_lines(name), name):
        if isinstance(block, InputError):
            raise InputError(f"{role} CoNLL-U: {block.reason}", path=block.path,
                             line=block.line, column=block.column)
        out.append(Dependencies(tuple(block.words), None if block.heads is None
                                else tuple(block.heads), tuple(block.upos), block.line))
    return out


def evaluate_heads_files(pred_path: str | Path, gold_path: str | Path,
                         conventions: BracketConventions | None = None) -> AttachmentReport:
    """Attachment accuracy of a CoNLL-U file of predicted heads (HEAD filled; a block whose
    HEAD is `_` throughout is a sentence without a parse, scored wrong) against CoNLL-U gold
    with heads, beside the left- and right-chain baselines. Only the punctuation options and
    `max_length` of `conventions` apply. Words must match sentence by sentence (or, in
    PRED, be the gold words left without punctuation; see `evaluate_attachment`)."""
    if prediction_format(gold_path) != "conllu":
        raise InputError("scoring heads needs CoNLL-U gold with heads", path=str(gold_path))
    pred = read_dependencies(pred_path, "predicted")
    gold = read_dependencies(gold_path, "gold")
    missing = next((g for g in gold if g.heads is None), None)
    if missing is not None:
        raise InputError("gold sentence has no heads (HEAD is `_`): nothing to score against",
                         path=str(gold_path), line=missing.line)
    attachment = evaluate_attachment(pred, gold, conventions, pred_path=str(pred_path),
                                     gold_path=str(gold_path))
    return AttachmentReport(attachment, {"predicted": str(pred_path), "gold": str(gold_path)})
