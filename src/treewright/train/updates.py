"""Parameter updates of the EM family, from expected counts to new rule scores.

- `maximum_likelihood`: the M-step of EM (Baker 1979; Lari & Young 1990), count / row total.
- `dirichlet_map`: MAP-EM with a symmetric Dirichlet(alpha) prior on every rule distribution;
  the posterior mode, p ~ count + (alpha - 1), for alpha >= 1 (alpha - 1 is the additive
  pseudo-count: alpha = 2 is add-one smoothing, alpha = 1 is plain maximum likelihood).
- `vb_log_weights` / `dirichlet_kl`: mean-field variational Bayes (Kurihara & Sato 2004,
  "An Application of the Variational Bayesian Approach to Probabilistic Context-Free
  Grammars"): q(theta_A) = Dirichlet(alpha + counts), and the E-step uses the sub-normalized
  weights exp(digamma(alpha_post) - digamma(sum of the row)).
- `stepwise_update`: online EM (Liang & Klein 2009, "Online EM for Unsupervised Models"):
  mu <- (1 - eta_t) mu + eta_t s_t with eta_t = (t + 2)^-power.

Rule distributions are the root (one row over NT), each nonterminal's binary rules (a row over
S*S; for independent productions, two rows over S, one per side) and each preterminal's words
(a row over V). A row whose counts are all zero under maximum
likelihood keeps its previous distribution, since count / 0 says nothing.
"""

from __future__ import annotations

import torch
from torch import Tensor

from treewright.params.independent import IndependentRules
from treewright.params.tabular import RuleTensors
from treewright.train.estep import ExpectedCounts


def _rows(x: Tensor, kind: str) -> Tensor:
    """View rules of one kind as (rows, outcomes)."""
    return x.reshape(1, -1) if kind == "root" else x.reshape(x.shape[0], -1)


KINDS = ("root", "binary", "lexical")


def _count_tensors(counts: ExpectedCounts | RuleTensors) -> tuple[Tensor, Tensor, Tensor]:
    return counts.root, counts.binary, counts.lexical


def _normalize(weights: Tensor, kind: str, previous: Tensor) -> Tensor:
    """log(weights / row total); rows with total 0 keep `previous` (log-probs)."""
    rows = _rows(weights, kind)
    total = rows.sum(1, keepdim=True)                        # (R, 1)
    empty = total <= 0
    logp = rows.log() - total.masked_fill(empty, 1.0).log()
    logp = torch.where(empty, _rows(previous, kind), logp)
    return logp.reshape(weights.shape)


def maximum_likelihood(counts: ExpectedCounts, previous: RuleTensors | IndependentRules
                       ) -> RuleTensors | IndependentRules:
    if isinstance(previous, IndependentRules):
        return _independent_update(counts, 0.0, previous)
    return RuleTensors(*(_normalize(c, kind, p) for c, kind, p
                         in zip(_count_tensors(counts), KINDS, previous)))


def dirichlet_map(counts: ExpectedCounts, alpha: float,
                  previous: RuleTensors | IndependentRules) -> RuleTensors | IndependentRules:
    if alpha < 1:
        raise ValueError(f"the Dirichlet mode needs alpha >= 1, got {alpha}")
    if isinstance(previous, IndependentRules):
        return _independent_update(counts, alpha - 1, previous)
    return RuleTensors(*(_normalize(c + (alpha - 1), kind, p) for c, kind, p
                         in zip(_count_tensors(counts), KINDS, previous)))


def _independent_update(counts: ExpectedCounts, extra: float, previous: IndependentRules
                        ) -> IndependentRules:
    """The M-step of independent productions, each factor's rows normalized on their own:
    with p(A -> B C) = L(B | A) R(C | A), the expected log-likelihood splits into
    sum c_L(A, B) log L(B | A) + sum c_R(A, C) log R(C | A) (counts `ExpectedCounts.binary`,
    (NT, 2, S)), maximized by each factor's counts over their row totals. `extra` is a
    Dirichlet prior's pseudo-count on every outcome of every factor (MAP-EM)."""
    return IndependentRules(_normalize(counts.root + extra, "root", previous.root),
                            _normalize(counts.binary[:, 0] + extra, "binary", previous.left),
                            _normalize(counts.binary[:, 1] + extra, "binary", previous.right),
                            _normalize(counts.lexical + extra, "lexical", previous.lexical))


def vb_posterior(counts: ExpectedCounts, alpha: float) -> RuleTensors:
    """Dirichlet parameters of q(theta): alpha + expected counts, per rule."""
    return RuleTensors(*(c + alpha for c in _count_tensors(counts)))


def vb_log_weights(posterior: RuleTensors) -> RuleTensors:
    """log pi~ = digamma(alpha_post) - digamma(sum of the row) (Kurihara & Sato 2004, eq. for
    the variational E-step); each row sums to less than one."""
    out = []
    for a, kind in zip(posterior, KINDS):
        rows = _rows(a, kind)
        out.append((torch.digamma(rows) - torch.digamma(rows.sum(1, keepdim=True)))
                   .reshape(a.shape))
    return RuleTensors(*out)


def vb_mean(posterior: RuleTensors) -> RuleTensors:
    """log E_q[theta], the posterior-mean grammar reported and saved after VB training."""
    out = []
    for a, kind in zip(posterior, KINDS):
        rows = _rows(a, kind)
        out.append((rows.log() - rows.sum(1, keepdim=True).log()).reshape(a.shape))
    return RuleTensors(*out)


def dirichlet_kl(posterior: RuleTensors, alpha: float) -> float:
    """sum over rows of KL(Dirichlet(posterior row) || Dirichlet(alpha, ..., alpha))."""
    total = 0.0
    for a, kind in zip(posterior, KINDS):
        rows = _rows(a, kind).double()                        # (R, K)
        k = rows.shape[1]
        row_sum = rows.sum(1)
        prior = torch.full_like(row_sum, float(alpha))
        kl = (torch.lgamma(row_sum) - torch.lgamma(rows).sum(1)
              - torch.lgamma(prior * k) + k * torch.lgamma(prior)
              + ((rows - alpha) * (torch.digamma(rows)
                                   - torch.digamma(row_sum)[:, None])).sum(1))
        total += float(kl.sum())
    return total


def stepwise_rate(update: int, power: float) -> float:
    """eta_t = (t + 2)^-power for the t-th update, t = 0, 1, ... (Liang & Klein 2009)."""
    return float((update + 2) ** -power)


def stepwise_update(statistics: RuleTensors, counts: ExpectedCounts, scale: float,
                    rate: float) -> RuleTensors:
    """mu <- (1 - rate) mu + rate * scale * s; `scale` puts a minibatch's counts s on the scale
    of the whole corpus (corpus size / minibatch size), which matters once a prior is added."""
    return RuleTensors(*((1 - rate) * m + rate * scale * c
                         for m, c in zip(statistics, _count_tensors(counts))))
