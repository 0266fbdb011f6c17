"""Training's float32 E-step runs with subnormal floats flushed to zero (a slow path on some
processors), and counts again, in float64, a sentence that flushing leaves with no tree.

Reference: brute-force enumeration of every tree in float64 (test_train_fixtures.brute_force)
over the same rule values. The grammar is invented: one nonterminal S over two preterminals,
with a rule of probability 1e-40, which float32 can hold only as a subnormal number (below its
smallest normal number, 2**-126 = 1.2e-38; IEEE 754, common practice)."""

from __future__ import annotations

import math

import pytest
import torch

from test_train_fixtures import brute_force
from treewright.params.tabular import RuleTensors
from treewright.train import estep
from treewright.train.estep import batch_counts, flushed_subnormals, make_batch

NEG_INF = float("-inf")
TINY = 1e-40
# torch.set_flush_denormal returns whether this processor can flush (x86 with SSE3 can).
CAN_FLUSH = torch.set_flush_denormal(False)


def _rules() -> RuleTensors:
    """S -> P0 P1 (about 1), S -> P1 P1 (1e-40); P0 -> w0; P1 -> w1 | w2 (0.5 each)."""
    binary = torch.full((1, 3, 3), NEG_INF, dtype=torch.float64)
    binary[0, 1, 2] = math.log1p(-TINY)
    binary[0, 2, 2] = math.log(TINY)
    lexical = torch.full((2, 3), NEG_INF, dtype=torch.float64)
    lexical[0, 0] = 0.0
    lexical[1, 1] = lexical[1, 2] = math.log(0.5)
    return RuleTensors(torch.zeros(1, dtype=torch.float64), binary, lexical)


# w1 w2 has one tree, through S -> P1 P1; w0 w1 one through S -> P0 P1; a lone word none (no
# rule rewrites S to a preterminal).
SENTENCES = [[1, 2], [0, 1], [0]]


@pytest.mark.skipif(not CAN_FLUSH, reason="this processor cannot flush subnormal floats")
def test_a_sentence_whose_only_tree_is_subnormal_is_counted_and_the_rest_match(monkeypatch):
    rules64 = _rules()
    rules32 = RuleTensors(*(t.float() for t in rules64))
    # The reference reads the values float32 holds (1e-40 is rounded as a subnormal).
    held = RuleTensors(*(t.double() for t in rules32))
    assert torch.finfo(torch.float32).tiny > float(held.binary[0, 2, 2].exp()) > 0
    calls = []
    tabular = estep._tabular_counts

    def spy(rules, batch):
        calls.append((estep._flushing(), len(batch.indices), rules.root.dtype))
        return tabular(rules, batch)

    monkeypatch.setattr(estep, "_tabular_counts", spy)
    counts = batch_counts(rules32, make_batch([0, 1, 2], SENTENCES, None, torch.float32))
    # First the flushed pass over all three; then, unflushed and in float64, the two it left
    # with no tree (one has none at all).
    assert calls == [(True, 3, torch.float32), (False, 2, torch.float64)]
    assert counts.unparsed == 1 and counts.sentences == 2 and counts.words == 4
    ref = [brute_force(held, s) for s in SENTENCES[:2]]
    assert counts.loglik == pytest.approx(ref[0][0] + ref[1][0], rel=1e-5)
    assert counts.loglik < -90   # log(1e-40 / 4) + log(1 / 2): the tiny rule was counted
    torch.testing.assert_close(counts.binary.double(), ref[0][2] + ref[1][2],
                               rtol=1e-5, atol=1e-6)
    torch.testing.assert_close(counts.lexical.double(), ref[0][3] + ref[1][3],
                               rtol=1e-5, atol=1e-6)
    assert not estep._flushing()   # the mode is as it was before the E-step


@pytest.mark.skipif(not CAN_FLUSH, reason="this processor cannot flush subnormal floats")
def test_float64_never_flushes_and_a_flushing_caller_keeps_its_mode(monkeypatch):
    rules64 = _rules()
    seen = []
    tabular = estep._tabular_counts
    monkeypatch.setattr(estep, "_tabular_counts",
                        lambda r, b: (seen.append(estep._flushing()), tabular(r, b))[1])
    counts = batch_counts(rules64, make_batch([0, 1, 2], SENTENCES, None, torch.float64))
    assert seen == [False] and counts.unparsed == 1
    ref = [brute_force(rules64, s) for s in SENTENCES[:2]]
    assert counts.loglik == pytest.approx(ref[0][0] + ref[1][0], abs=1e-10)
    with flushed_subnormals():
        batch_counts(RuleTensors(*(t.float() for t in rules64)),
                     make_batch([1], SENTENCES, None, torch.float32))
        assert estep._flushing()
    assert not estep._flushing()
