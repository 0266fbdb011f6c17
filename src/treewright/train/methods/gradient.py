"""Gradient training: Adam on the negative log-likelihood (or, for a latent-variable model, the
negative ELBO) per word of each minibatch, with a learning-rate schedule and clipping."""

from __future__ import annotations

import math

import torch

from treewright.train.curriculum import restart_seed
from treewright.train.estep import DivergedError
from treewright.train.methods.base import Step, Update, UpdateMethod, tally
from treewright.train.schedule import learning_rate

STATE = "adam."


def sample_seed(seed: int, step: int) -> int:
    """The seed of the latent samples of update `step` (a resumed run draws the same ones).
    It uses the run seed's restart-0 stream for every restart, as runs always have."""
    return restart_seed(seed, 0) * 7_919 + 1 + step


class Gradient(UpdateMethod):
    """Owns the Adam optimizer and its moments."""

    def __init__(self, cfg, model):
        super().__init__(cfg, model)
        o = cfg.optimizer
        self.optimizer = torch.optim.Adam(model.parameters(), lr=o.lr, betas=(o.beta1, o.beta2))

    def annealing_exponent(self, step: Step) -> float:
        """beta of deterministic annealing (train.anneal_from, train.anneal_epochs) at this
        update: linear from 1 / anneal_from (a temperature) at the restart's first update to 1
        after anneal_epochs of its epochs."""
        t = self.cfg.train
        if t.anneal_epochs == 0 or t.anneal_from == 1.0:
            return 1.0
        start = 1.0 / t.anneal_from
        steps = t.anneal_epochs * step.total_steps / t.epochs
        return start + (1.0 - start) * min(1.0, step.restart_step / steps)

    def update(self, step: Step) -> Update:
        o = self.cfg.optimizer
        world = step.world
        (group,) = step.groups
        mine = world.shard_batch(group, step.sentences)
        kl = None
        beta = self.annealing_exponent(step)
        if mine:
            batch = step.batch(mine)
            # One reparameterized sample per sentence for a latent-variable model, drawn from a
            # generator seeded by the step.
            gen = torch.Generator().manual_seed(sample_seed(self.cfg.train.seed, step.step))
            extra = {} if beta == 1.0 else {"beta": beta}    # lexicalized only (config check)
            if batch.head_bias is not None:                    # lexicalized only, too
                extra["head_bias"] = batch.head_bias
            if batch.arc_length != 0.0:                        # lexicalized only, too
                extra["arc_length"] = batch.arc_length
            logz, kl = self.model.log_partition(batch.ids, batch.lengths, batch.span_pot,
                                                gen, **extra)                 # (B,), (B,)
        else:
            batch = None
            # A worker dealt nothing still joins the all-reduce.
            logz = next(self.model.parameters()).new_zeros(0)
        if bool(torch.isnan(logz).any() | (logz == float("inf")).any()):
            raise DivergedError("the log-likelihood of a batch is NaN or infinite")
        parsed = torch.isfinite(logz)
        # The loss is divided by the words of the whole minibatch over all workers.
        kl_sum = kl[parsed].sum() if kl is not None else logz.new_zeros(())
        loglik, words, sentences, unparsed, kl_total = world.sum_values(
            [float(logz[parsed].sum().detach()), 0 if batch is None else
             int(batch.lengths[parsed].sum()), int(parsed.sum()), int((~parsed).sum()),
             float(kl_sum.detach())])
        words = int(words)
        # Latent-variable model: the negative ELBO, log p(x | z) - KL(q || prior), per word.
        loss = -(logz[parsed].sum() - kl_sum) / max(words, 1)
        self.optimizer.zero_grad()
        if batch is not None:
            loss.backward()
        if world.size > 1:
            world.sum_gradients(list(self.model.parameters()))
        params = [p for p in self.model.parameters() if p.grad is not None]
        if o.grad_clip is not None:
            norm = float(torch.nn.utils.clip_grad_norm_(params, o.grad_clip))
        else:
            norm = float(torch.linalg.vector_norm(torch.stack(
                [torch.linalg.vector_norm(p.grad) for p in params])))
        if not math.isfinite(norm):
            raise DivergedError("the gradient norm is NaN or infinite")
        lr = learning_rate(step.restart_step, step.total_steps, o.lr, o.warmup_steps,
                           o.schedule, o.min_lr_ratio)
        for param_group in self.optimizer.param_groups:
            param_group["lr"] = lr
        self.optimizer.step()
        if step.progress is not None:
            step.progress.update(len(group))
        return Update(tally(loglik, words, int(sentences), int(unparsed), kl_total),
                      step_metrics={"lr": lr, "grad_norm": norm,
                                    **({} if beta == 1.0 else {"anneal_beta": beta})})

    def state_tensors(self):
        tensors = {}
        for index, state in self.optimizer.state_dict()["state"].items():
            for key, value in state.items():
                tensors[f"{STATE}{index}.{key}"] = torch.as_tensor(value)
        return tensors

    def load_state(self, tensors):
        state: dict[int, dict] = {}
        for key, value in tensors.items():
            if key.startswith(STATE):
                _, index, name = key.split(".", 2)
                state.setdefault(int(index), {})[name] = value
        groups = self.optimizer.state_dict()["param_groups"]
        self.optimizer.load_state_dict({"state": state, "param_groups": groups})
