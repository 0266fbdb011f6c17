"""`engine.maxplus.max_plus` against the maximum over every column, computed by brute force."""

from __future__ import annotations

import math

import pytest
import torch

from treewright.engine import maxplus


@pytest.mark.parametrize("shape", [(40, 7, 12), (40, 30, 6)])
@pytest.mark.parametrize("dense", [0.0, 0.2, 1.0])
@pytest.mark.parametrize("depth", [1, 3, 64])
@pytest.mark.parametrize("dtype", [torch.float64, torch.float32])
def test_max_plus_equals_every_column_compared(monkeypatch, dtype, depth, dense, shape):
    # Reference: brute force, max over every column of values[m, k] + weights[r, k]. The rows
    # mix peaked and flat ones, rows that are -inf throughout or in places, weights of
    # probability zero, and exact ties between two columns; `dense` 0 sends every chunk after
    # the first through every column, 1 never. Shapes: weights with fewer rows than columns
    # and with more.
    shipped = maxplus.BOUNDED_FROM
    monkeypatch.setattr(maxplus, "CHUNK", 2 ** 9)
    monkeypatch.setattr(maxplus, "DENSE_SHARE", dense)
    monkeypatch.setattr(maxplus, "BOUNDED_FROM", 0)     # the bounds even for this small product
    monkeypatch.setattr(maxplus, "CANDIDATE_SHARE", 1.0)  # ... and for candidates of any share
    monkeypatch.setattr(maxplus, "PROBE_ROWS", 3)          # a first chunk smaller than the rest
    gen = torch.Generator().manual_seed(11)
    M, R, K = shape
    values = torch.randn(M, K, generator=gen, dtype=torch.float64) * \
        torch.linspace(0.1, 12.0, M, dtype=torch.float64)[:, None]
    values[3] = -math.inf
    values[5, ::2] = -math.inf
    values[8, 1:] = -math.inf
    values[10, K - 3] = values[10, 4] = values[10].max() + 1.0        # a tie between columns
    weights = torch.log_softmax(torch.randn(R, K, generator=gen, dtype=torch.float64) * 3, -1)
    weights[2, 4] = -math.inf
    weights[:, K - 3] = weights[:, 4]
    values, weights = values.to(dtype), weights.to(dtype)
    want = (values[:, None, :] + weights[None]).amax(-1)
    got = maxplus.max_plus(values, maxplus.MaxPlusWeights(weights), depth)
    assert torch.equal(got, want)
    monkeypatch.setattr(maxplus, "BOUNDED_FROM", shipped)   # as shipped: every column at once
    assert torch.equal(maxplus.max_plus(values, maxplus.MaxPlusWeights(weights), depth), want)
    assert torch.equal(maxplus.max_plus_dense(values, maxplus.MaxPlusWeights(weights)), want)


def test_max_plus_refuses_mixed_dtypes():
    # The compiled loop adds values and weights in one dtype; a float32 row beside float64
    # weights would be added in float64 by torch's promotion, so it is refused by name.
    weights = maxplus.MaxPlusWeights(torch.zeros(3, 4, dtype=torch.float64))
    for product in (maxplus.max_plus, maxplus.max_plus_dense):
        with pytest.raises(ValueError, match="float32 and weights torch.float64"):
            product(torch.zeros(2, 4, dtype=torch.float32), weights)


def test_compiled_loops_run_where_no_cache_folder_can_be_written(monkeypatch):
    # numba refuses cache=True where neither the module's folder nor its per-user folder can
    # be written ("cannot cache function ...: no locator available"); `jit` then compiles
    # without a cache. Reference: the sum of 0.5, 1.5 and 2.5 (4.5).
    import numba
    import numpy as np

    from treewright.engine.compiled import jit

    real = numba.njit

    def refusing(*args, **options):
        if options.get("cache"):
            raise RuntimeError("cannot cache function 'total': no locator available")
        return real(*args, **options)

    monkeypatch.setattr(numba, "njit", refusing)

    def total(values):
        out = 0.0
        for v in values:
            out += v
        return out

    assert jit(total)(np.array([0.5, 1.5, 2.5])) == 4.5
