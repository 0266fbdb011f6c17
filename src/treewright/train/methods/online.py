"""Online (stepwise) EM (Liang & Klein 2009, "Online EM for Unsupervised Models"): one update
per minibatch, mu <- (1 - eta_t) mu + eta_t s_t, then the Dirichlet MAP M-step on mu."""

from __future__ import annotations

import torch

from treewright.params.tabular import RuleTensors
from treewright.train import updates
from treewright.train.estep import ExpectedCounts
from treewright.train.methods.base import (Step, Update, UpdateMethod, counts_tally,
                                           minibatch_counts)

STATE = "stats.mu."


class OnlineEM(UpdateMethod):
    """Owns the running statistics mu (rows on the corpus's scale)."""

    def __init__(self, cfg, model):
        super().__init__(cfg, model)
        # mu starts as the initial distributions themselves (rows summing to one), so a symbol
        # the first minibatch does not reach keeps its initial distribution.
        self.mu = RuleTensors(*(x.exp() for x in self.rules()))

    def update(self, step: Step) -> Update:
        rules = self.rules()
        counts = minibatch_counts(rules, step)
        rate = updates.stepwise_rate(step.restart_step, self.cfg.online.stepsize_power)
        scale = len(step.sentences) / len(step.groups[0])
        self.mu = updates.stepwise_update(self.mu, counts, scale, rate)
        # The M-step reads the running statistics as if they were one corpus's counts.
        statistics = ExpectedCounts(*self.mu, 0.0, 0, 0, 0)
        self.model.set_log_probs(updates.dirichlet_map(statistics, self.cfg.prior.concentration,
                                                       rules))
        return Update(counts_tally(counts), step_metrics={"step/stepsize": rate})

    def state_tensors(self) -> dict[str, torch.Tensor]:
        return {STATE + k: x for k, x in zip(updates.KINDS, self.mu)}

    def load_state(self, tensors):
        self.mu = RuleTensors(*(tensors[STATE + k] for k in updates.KINDS))
