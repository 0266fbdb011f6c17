"""Batch EM (Baker 1979; Lari & Young 1990) and MAP-EM with a symmetric Dirichlet prior: one
update per epoch, from the expected counts of every sentence."""

from __future__ import annotations

from treewright.train import updates
from treewright.train.methods.base import Step, Update, UpdateMethod, counts_tally, epoch_counts


class EM(UpdateMethod):
    """Maximum likelihood: count / row total (`updates.maximum_likelihood`)."""

    whole_epoch = True
    converges = True

    def update(self, step: Step) -> Update:
        total = epoch_counts(self.rules(), step)
        self.model.set_log_probs(updates.maximum_likelihood(total, self.rules()))
        return Update(counts_tally(total))


class MapEM(UpdateMethod):
    """The posterior mode under Dirichlet(prior.concentration) (`updates.dirichlet_map`)."""

    whole_epoch = True
    converges = True

    def update(self, step: Step) -> Update:
        alpha = self.cfg.prior.concentration
        total = epoch_counts(self.rules(), step)
        previous = self.rules()
        # The objective MAP-EM climbs: log p(x | theta) + log p(theta), the prior's normalising
        # constant left out.
        log_posterior = total.loglik + (alpha - 1) * sum(float(x.sum()) for x in previous)
        self.model.set_log_probs(updates.dirichlet_map(total, alpha, previous))
        return Update(counts_tally(total), {
            "train/log_posterior": log_posterior,
            "train/log_posterior_per_word": log_posterior / max(total.words, 1)})
