"""Confidence intervals for a mean measured on a sample of inputs: how far the mean over the inputs measured may
lie from the mean over all inputs of the kind, so that a drift measured on few inputs says how precise it is.

The interval is Student's t interval for a mean (Student 1908; "Student", Biometrika 6(1)), half-width
``t_{(1+c)/2, n-1} * s / sqrt(n)`` with ``s`` the sample standard deviation. It assumes the inputs were drawn at
random from the population meant; a mean of per-sample cosines is bounded, so for the sample sizes used here the
t interval is the usual choice (common practice). The t quantile is found by integrating the density numerically
(Simpson's rule) and bisecting, checked against scipy.stats.t in tests/measure/test_interval.py.
"""

from __future__ import annotations

import functools
import math

import torch

CONFIDENCE = 0.95


def _t_density(x: float, dof: float) -> float:
    log_c = math.lgamma((dof + 1) / 2) - math.lgamma(dof / 2) - 0.5 * math.log(dof * math.pi)
    return math.exp(log_c - (dof + 1) / 2 * math.log1p(x * x / dof))


def _t_cdf_above_half(x: float, dof: float, steps: int = 2000) -> float:
    """P(T <= x) - 1/2 for x >= 0, by Simpson's rule on [0, x] (the density is smooth there)."""
    h = x / steps
    total = _t_density(0.0, dof) + _t_density(x, dof)
    for i in range(1, steps):
        total += (4 if i % 2 else 2) * _t_density(i * h, dof)
    return total * h / 3


@functools.lru_cache(maxsize=256)
def t_quantile(p: float, dof: float) -> float:
    """The ``p`` quantile of Student's t distribution with ``dof`` degrees of freedom, for 0.5 <= p < 1 (to about
    1e-6 for dof >= 1; bisection on the numerically integrated distribution function)."""
    if not 0.5 <= p < 1 or dof <= 0:
        raise ValueError(f"t_quantile needs 0.5 <= p < 1 and dof > 0, got p={p}, dof={dof}")
    target, lo, hi = p - 0.5, 0.0, 1.0
    while _t_cdf_above_half(hi, dof) < target:
        hi *= 2
    for _ in range(60):
        mid = (lo + hi) / 2
        if _t_cdf_above_half(mid, dof) < target:
            lo = mid
        else:
            hi = mid
        if hi - lo < 1e-7:
            break
    return (lo + hi) / 2


def mean_half_width(values: torch.Tensor, confidence: float = CONFIDENCE) -> float | None:
    """Half-width of the two-sided ``confidence`` t interval for the mean of ``values`` (one number per sample);
    None for fewer than two values or any non-finite one."""
    v = values.detach().to(torch.float64).reshape(-1)
    n = int(v.numel())
    if n < 2 or not bool(torch.isfinite(v).all()):
        return None
    s = float(v.std(unbiased=True))
    return t_quantile((1 + confidence) / 2, n - 1) * s / math.sqrt(n)
