"""What every update method shares: the interface the loop calls, and the EM family's E-step
over a whole epoch.

An update method owns its statistics or optimizer, its update and the tensors it checkpoints.
The loop hands it one `Step` at a time (the sentence groups of one update and where the run
is) and gets back an `Update` (the tally of the sentences seen and the metrics to log); it never
asks which method it holds.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Callable, Sequence

import torch

from treewright.params.base import RuleModel
from treewright.tracking import Progress
from treewright.train.estep import Batch, ExpectedCounts, add_counts, batch_counts, zero_counts


@dataclass
class Step:
    """One update's inputs."""
    groups: list[list[int]]            # training sentence indices of each batch of the update
    batch: Callable[[list[int]], Batch]   # the engine batch of some sentences (bias applied)
    sentences: Sequence                # every training sentence's word ids (for sharding)
    batch_size: int
    world: Any                         # train.distributed.LocalWorld or a worker group
    step: int                          # updates over the whole run before this one
    restart_step: int                  # updates within this restart before this one
    total_steps: int                   # updates this restart will make (for schedules)
    progress: Progress | None = None


@dataclass
class Update:
    """One update's outcome: the tally over its sentences (keys of `tally`), metrics for the
    epoch's line, and metrics for the step's line (None: the method logs no step lines)."""
    tally: dict
    epoch_metrics: dict = field(default_factory=dict)
    step_metrics: dict | None = None


def tally(loglik: float, words: int, sentences: int, unparsed: int, kl: float = 0.0) -> dict:
    return {"loglik": loglik, "words": words, "sentences": sentences, "unparsed": unparsed,
            "kl": kl}


class UpdateMethod:
    """Base of every update method.

    `whole_epoch`: one update per epoch over every sentence (the EM family), else one per
    minibatch (minibatches are then drawn in a shuffled order when
    `train.shuffle`). `converges`: whether
    `train.tolerance` may end a restart early. `first_comparable_epoch`: the first epoch whose
    objective compares with the previous epoch's.
    """

    whole_epoch = False
    converges = False
    first_comparable_epoch = 1

    def __init__(self, cfg, model: RuleModel):
        self.cfg = cfg
        self.model = model

    def rules(self) -> Any:
        """The grammar as it stands, without gradient (what is scored, reported and saved)."""
        return self.model.snapshot()

    def update(self, step: Step) -> Update:
        raise NotImplementedError

    def state_tensors(self) -> dict[str, torch.Tensor]:
        """The method's own state for the checkpoint (beside the model's parameters)."""
        return {}

    def load_state(self, tensors: dict[str, torch.Tensor]) -> None:
        """Restore `state_tensors` from a checkpoint's tensors (every key, model's included)."""


def epoch_counts(rules, step: Step) -> ExpectedCounts:
    """Expected counts of every sentence of the epoch under `rules`, summed over workers; the
    progress line moves per batch (and by the other workers' sentences at the end)."""
    total = zero_counts(rules)
    for group in step.world.shard_epoch(step.groups, step.sentences, step.batch_size):
        total = add_counts(total, batch_counts(rules, step.batch(group)))
        if step.progress is not None:
            step.progress.update(len(group))
    mine = total.sentences + total.unparsed
    total = step.world.sum_counts(total)
    if step.progress is not None:      # the other workers' sentences, known once summed
        step.progress.update(total.sentences + total.unparsed - mine)
    return total


def minibatch_counts(rules, step: Step) -> ExpectedCounts:
    """Expected counts of the one minibatch of `step`, summed over workers (a worker dealt no
    sentence still joins the sum)."""
    (group,) = step.groups
    mine = step.world.shard_batch(group, step.sentences)
    counts = step.world.sum_counts(batch_counts(rules, step.batch(mine)) if mine
                                   else zero_counts(rules))
    if step.progress is not None:
        step.progress.update(len(group))
    return counts


def counts_tally(counts: ExpectedCounts) -> dict:
    return tally(counts.loglik, counts.words, counts.sentences, counts.unparsed)
