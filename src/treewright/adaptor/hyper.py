"""Resampling the Pitman-Yor discount a and concentration b of each adapted symbol: slice
sampling (Neal 2003, "Slice sampling", The Annals of Statistics 31(3)) of each in turn from
its posterior given the seating, as Johnson & Goldwater 2009 ("Improving nonparameteric
Bayesian inference: experiments on unsupervised word segmentation with adaptor grammars") do.

The likelihood of (a, b) is the probability of the restaurant's partition of its customers
into tables (the Pitman-Yor exchangeable partition probability, Pitman 1995, "Exchangeable and
partially exchangeable random partitions"): with n customers at K tables of c_1..c_K,

    P = prod_{k=1}^{K-1} (b + k a) * prod_{k=1}^{K} prod_{j=1}^{c_k - 1} (j - a)
        / prod_{i=1}^{n-1} (b + i)

The base distribution's share does not depend on (a, b). Priors: a ~ Beta(1, 1) (uniform) and
b ~ Gamma(shape 10, scale 0.1), the ones Johnson & Goldwater use as we remember them (from
memory, not checked); b then stays positive.
"""

from __future__ import annotations

import math
from typing import Callable, Sequence

import numpy as np

B_SHAPE, B_SCALE = 10.0, 0.1


def log_partition_probability(counts: Sequence[int], discount: float,
                              concentration: float) -> float:
    """log P of a seating with `counts` customers per table (formula in the module docstring);
    0 for an empty restaurant."""
    n, k = sum(counts), len(counts)
    a, b = discount, concentration
    total = math.fsum(math.log(b + t * a) for t in range(1, k))
    total += math.fsum(math.log(j - a) for c in counts for j in range(1, c))
    return total - math.fsum(math.log(b + i) for i in range(1, n))


def slice_sample(log_density: Callable[[float], float], x: float, rng: np.random.Generator,
                 width: float = 1.0, lower: float = -math.inf, upper: float = math.inf,
                 max_steps: int = 50) -> float:
    """One slice-sampling update of x (Neal 2003, section 4: stepping out by `width` at most
    `max_steps` times each way, then shrinking). `log_density` is the log of an unnormalized
    density, finite at x; points outside (lower, upper) have density 0."""
    def log_f(y: float) -> float:
        return log_density(y) if lower < y < upper else -math.inf

    level = log_f(x) + math.log(rng.random())  # the slice: {y : log f(y) > level}
    left = x - width * rng.random()
    right = left + width
    steps = int(max_steps * rng.random())
    for _ in range(steps):
        if left <= lower or not log_f(left) > level:
            break
        left -= width
    for _ in range(max_steps - 1 - steps):
        if right >= upper or not log_f(right) > level:
            break
        right += width
    left, right = max(left, lower), min(right, upper)
    while True:
        y = left + (right - left) * rng.random()
        if log_f(y) > level:
            return y
        if y < x:
            left = y
        else:
            right = y


def resample(counts: Sequence[int], discount: float, concentration: float,
             rng: np.random.Generator) -> tuple[float, float]:
    """New (a, b) of one restaurant: a slice-sampling update of a given b, then of b given
    the new a, each under its prior and the partition probability of `counts`. The current
    values must lie where the priors are positive: 0 < a < 1 and b > 0."""
    if not (0.0 < discount < 1.0 and concentration > 0.0):
        raise ValueError(f"resampling needs 0 < discount < 1 and concentration > 0, not "
                         f"{discount} and {concentration}")

    def log_a(a: float) -> float:  # Beta(1, 1): flat on (0, 1)
        return log_partition_probability(counts, a, concentration)

    a = slice_sample(log_a, discount, rng, width=0.1, lower=0.0, upper=1.0)

    def log_b(b: float) -> float:  # Gamma(shape, scale)
        return (B_SHAPE - 1.0) * math.log(b) - b / B_SCALE + \
            log_partition_probability(counts, a, b)

    b = slice_sample(log_b, concentration, rng, width=1.0, lower=0.0)
    return a, b
