"""Dev scores during training. The trainer calls a dev evaluator with a `params.Scorer` of the
grammar as it stands and logs the metrics it returns; the caller chooses the evaluator.
`DevLikelihood` (the default) scores the dev log-likelihood; a caller that wants bracket F1
(`treewright.induce.DevEvaluator`) extends it with decoding and evaluation, which this layer
does not import."""

from __future__ import annotations


from torch import Tensor

from treewright.corpus import length_batches
from treewright.params.base import Scorer
from treewright.tracking import perplexity
from treewright.train.data import MemoryBudget, TrainData
from treewright.train.estep import make_batch


class DevLikelihood:
    """Dev log-likelihood per word, perplexity, unparsed sentences and those over the memory
    budget. Subclasses that set `wants_spans` receive each sentence's span marginals through
    `sentence_spans` and add their metrics in `finish`."""

    wants_spans = False

    def __init__(self, data: TrainData, batch_size: int, budget: MemoryBudget, dtype):
        self.data = data
        self.batch_size = batch_size
        self.budget = budget
        self.dtype = dtype

    def baselines(self) -> tuple[dict, list[str]]:
        """Metrics of reference systems on the dev set, logged once at the start, and notes."""
        return {}, []

    def __call__(self, scorer: Scorer) -> dict[str, float]:
        data = self.data
        if not data.dev_ids:
            return {}
        total, words, unparsed = 0.0, 0, 0
        fits = [i for i, s in enumerate(data.dev_ids) if len(s) <= self.budget.max_length]
        self.start(set(range(len(data.dev_ids))) - set(fits))
        for part in length_batches([len(data.dev_ids[i]) for i in fits], self.batch_size,
                                   max_cost=self.budget.max_bytes,
                                   cost=self.budget.sentence_bytes):
            group = [fits[k] for k in part]
            batch = make_batch(group, data.dev_ids, None, self.dtype)
            if self.wants_spans:
                logz, marginals = scorer.span_posteriors(batch.ids, batch.lengths)
                for b, i in enumerate(group):
                    self.sentence_spans(i, marginals[b])
            else:
                logz = scorer.log_likelihood(batch.ids, batch.lengths)
            ok = logz.isfinite()
            total += float(logz[ok].sum())
            words += int(batch.lengths[ok].sum())
            unparsed += int((~ok).sum())
        out = {"dev/loglik_per_word": total / words if words else float("nan"),
               "dev/unparsed": unparsed, "dev/over_memory_budget": len(data.dev_ids) - len(fits)}
        out["dev/perplexity"] = perplexity(out["dev/loglik_per_word"]) if words else float("nan")
        out.update(self.finish())
        return out

    def start(self, unscored: set[int]) -> None:
        """Called before scoring, with the dev sentences over the memory budget."""

    def sentence_spans(self, index: int, marginals: Tensor) -> None:
        """Dev sentence `index`'s span marginals (N+1, N+1) [start, width]."""

    def finish(self) -> dict[str, float]:
        return {}
