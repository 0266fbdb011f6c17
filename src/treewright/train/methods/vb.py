"""Mean-field variational Bayes (Kurihara & Sato 2004, "An Application of the Variational
Bayesian Approach to Probabilistic Context-Free Grammars"): q(theta) = Dirichlet(alpha + counts),
one update per epoch; the E-step runs on the sub-normalized weights exp(E_q[log theta])."""

from __future__ import annotations

import torch

from treewright.params.tabular import RuleTensors
from treewright.train import updates
from treewright.train.methods.base import Step, Update, UpdateMethod, counts_tally, epoch_counts

STATE = "stats.vb."


class VB(UpdateMethod):
    """Owns q(theta)'s Dirichlet parameters (None until the first update)."""

    whole_epoch = True
    converges = True
    first_comparable_epoch = 2   # the first epoch reports a log-likelihood, not an ELBO

    def __init__(self, cfg, model):
        super().__init__(cfg, model)
        self.posterior: RuleTensors | None = None

    def rules(self):
        """The posterior-mean grammar once q(theta) exists; the model's start before."""
        if self.posterior is None:
            return super().rules()
        with torch.no_grad():
            return updates.vb_mean(self.posterior)

    def update(self, step: Step) -> Update:
        alpha = self.cfg.prior.concentration
        weights = self.rules() if self.posterior is None else \
            updates.vb_log_weights(self.posterior)
        total = epoch_counts(weights, step)
        extra = {}
        if self.posterior is not None:
            # ELBO = sum log Z~ - KL(q(theta) || prior), with q(z) optimal for q(theta)
            # (Kurihara & Sato 2004); computed before q(theta) moves.
            elbo = total.loglik - updates.dirichlet_kl(self.posterior, alpha)
            extra = {"train/elbo": elbo, "train/elbo_per_word": elbo / max(total.words, 1)}
        self.posterior = updates.vb_posterior(total, alpha)
        self.model.set_log_probs(updates.vb_mean(self.posterior))
        return Update(counts_tally(total), extra)

    def state_tensors(self):
        if self.posterior is None:
            return {}
        return {STATE + k: x for k, x in zip(updates.KINDS, self.posterior)}

    def load_state(self, tensors):
        if STATE + "root" in tensors:
            self.posterior = RuleTensors(*(tensors[STATE + k] for k in updates.KINDS))
