"""One contract test over every component of the two registries: each parameterization's
model interface against brute-force enumeration, and each update method's checkpoint tensors
round-tripped. A new parameterization or method is checked here by adding it to its registry."""

from __future__ import annotations

import types

import pytest
import torch

from _brute import lexicalized_summary
from test_train_fixtures import brute_force
from treewright.params import PARAMETERIZATIONS, RuleTensors
from treewright.train.distributed import LocalWorld
from treewright.train.config import MethodConfig
from treewright.train.estep import make_batch
from treewright.train.methods import METHODS, Step

SENTENCES = [[0, 2, 1, 1], [2, 0, 1], [1, 2]]


def _options(**extra):
    values = dict(nonterminals=2, preterminals=2, init_scale=1.0, embedding_dim=6,
                  residual_blocks=1, rank=3, latent_dim=2, head_classes=3)
    values.update(extra)
    return types.SimpleNamespace(**values)


def _model(name: str):
    gen = torch.Generator().manual_seed(5)
    return PARAMETERIZATIONS[name].from_options(_options(), 3, gen, torch.float64)


@pytest.mark.parametrize("name", sorted(PARAMETERIZATIONS))
def test_every_model_gives_log_z_and_span_posteriors_of_its_rules(name):
    # Reference: brute force over every tree of each sentence (tests/test_train_fixtures.py),
    # under the dense rules each sentence is scored with; for the lexicalized model, over every
    # lexicalized tree under the factors it gathers for the sentence (tests/_brute.py).
    model = _model(name)
    batch = make_batch(range(len(SENTENCES)), SENTENCES, None, torch.float64)
    with torch.no_grad():
        if name == "lexicalized":    # scored by its head-word rules, not by rules()
            factors = model.factors(batch.ids, batch.lengths)
            rules = None
            kl = torch.zeros(len(SENTENCES), dtype=torch.float64)
        elif name == "compound":     # each sentence's grammar at the mean of q(z | x)
            per_sentence = model.sentence_rules(batch.ids, batch.lengths)
            rules = [per_sentence.sentence(b) for b in range(len(SENTENCES))]
            kl = per_sentence.kl
        else:
            dense = model.rules().dense()
            rules = [RuleTensors(*dense)] * len(SENTENCES)
            kl = torch.zeros(len(SENTENCES), dtype=torch.float64)
    if rules is None:
        summaries = [lexicalized_summary(factors, b, len(s)) for b, s in enumerate(SENTENCES)]
        reference = [(x["logz"], None, None, None, x["spans"]) for x in summaries]
    else:
        reference = [brute_force(r, s) for r, s in zip(rules, SENTENCES)]
    logz, model_kl = model.log_partition(batch.ids, batch.lengths)   # z at the mean: no noise
    assert logz.requires_grad                                          # training needs it
    torch.testing.assert_close(logz.detach(), torch.tensor([r[0] for r in reference],
                                                           dtype=torch.float64),
                               atol=1e-10, rtol=0)
    assert (model_kl is None) == (name != "compound")
    # The dev scorer: log Z minus the KL term (the ELBO at the mean; KL 0 without a latent),
    # and span marginals equal to the brute-force posterior mass of each span.
    scorer = model.scorer(None if name == "compound" else model.snapshot())
    dev_logz, spans = scorer.span_posteriors(batch.ids, batch.lengths)
    torch.testing.assert_close(dev_logz, logz.detach() - kl, atol=1e-10, rtol=0)
    torch.testing.assert_close(scorer.log_likelihood(batch.ids, batch.lengths), dev_logz,
                               atol=1e-10, rtol=0)
    for b, ref in enumerate(reference):
        for (i, j), mass in ref[4].items():
            if j - i < len(SENTENCES[b]):      # the whole sentence is not a scored span
                assert float(spans[b, i, j - i]) == pytest.approx(mass, abs=1e-9)


def _config(method: str):
    return types.SimpleNamespace(
        train=MethodConfig(shuffle=True, seed=0),   # the real options, defaults elsewhere
        prior=types.SimpleNamespace(concentration=1.5),
        online=types.SimpleNamespace(stepsize_power=0.7),
        optimizer=types.SimpleNamespace(lr=0.05, beta1=0.75, beta2=0.999, grad_clip=3.0,
                                        warmup_steps=0, schedule="constant", min_lr_ratio=0.1))


@pytest.mark.parametrize("method", sorted(METHODS))
def test_every_method_restores_its_state_from_its_checkpoint_tensors(method):
    # Reference: the method itself; two updates in a row, against one update, a checkpoint
    # (model and method tensors), a fresh model and method loaded from it, then the second
    # update; the parameters after both must be equal bit for bit (float64).
    def step_of(k: int) -> Step:
        groups = [[0, 1, 2]] if METHODS[method].whole_epoch else [[k % 3]]
        return Step(groups, lambda idx: make_batch(idx, SENTENCES, None, torch.float64),
                    SENTENCES, 3, LocalWorld(), k, k, 4)

    def fresh():
        model = _model("tabular")
        return model, METHODS[method](_config(method), model)

    model, runner = fresh()
    for k in range(2):
        runner.update(step_of(k))
    straight = {n: p.detach().clone() for n, p in model.named_parameters()}

    model, runner = fresh()
    runner.update(step_of(0))
    tensors = {f"model.{k}": v.clone() for k, v in model.state_dict().items()}
    tensors.update({k: v.clone() for k, v in runner.state_tensors().items()})
    model, runner = fresh()
    model.load_state_dict({k[6:]: v for k, v in tensors.items() if k.startswith("model.")})
    runner.load_state(tensors)
    runner.update(step_of(1))
    for name, p in model.named_parameters():
        assert torch.equal(p.detach(), straight[name]), name
