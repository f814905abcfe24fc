"""Rank and stored precision chosen together on calibration inputs (``cost="bytes"`` with calibration).

The error of every candidate form of a layer (:mod:`factorize.plan.forms`) is measured in the metric its
activation-aware spectrum uses (:mod:`factorize.calibrated.aware`): trace(G' dW C' dW^T), with C' = C + lambda I
the input second moment plus the spectrum's ridge, and G' = G + mu I the output Gram matrix plus its ridge when
output weights were collected (else the identity). Truncation, rounding and the correction's residual then add
up across layers on the same scale the rank-only allocator uses (:attr:`Calibration.error_scale`), and rounding
uses error feedback on the same C (GPTQ, Frantar et al. 2023).

Layers whose statistics are on the output side (m x m, see :mod:`factorize.calibrated.stats`) have no n x n
input moment: their rounding is priced and done with its diagonal, as for an embedding (scales chosen on the
input moments, no error feedback), which ignores correlations between input channels.

Centring (bias correction) is left out of the rounding metric: the candidates are priced on the uncentred C,
which overstates a centred layer's error slightly and never understates it.
"""

from __future__ import annotations

from typing import Any

import torch

from factorize.measure.latency import latency_plan
from factorize.plan.forms import LayerMetric, bytes_plan, layer_budget, price_sites, uniform_rounding_plan
from factorize.plan.policy import Policy

Calibration = Any  # factorize.calibrated.search.Calibration (which imports this module)


def layer_metric(calib: Calibration, name: str) -> LayerMetric:
    """The output-weighted error measure of layer ``name``, on the scale the allocator uses."""
    G = None
    if calib.output_grams is not None:
        G = calib.output_grams[name].to(torch.float64)
        mu = calib.fit.output_ridge * float(G.diagonal().mean())
        G = G + (mu if mu > 0 else 1.0) * torch.eye(G.shape[0], dtype=G.dtype, device=G.device)  # (m, m)
    return metric_of(calib.spectra[name], calib.stats[name], G, (calib.error_scale or {}).get(name))


def metric_of(spec, stats, output_gram: torch.Tensor | None = None, scale: float | None = None) -> LayerMetric:
    """trace(G' dW C' dW^T) * scale for one layer: C' = C + lambda I from its statistics and its activation-aware
    spectrum's ridge, G' the output Gram matrix with its ridge (None: the identity), ``scale`` the allocator's
    (None: one over the spectrum's energy, as the rank-only allocator scales it)."""
    if stats.is_diagonal or stats.is_output_side:
        C = stats.moment_diagonal().to(torch.float64) + spec.ridge  # (n,) token counts, or diag C (output side)
    else:
        C = stats.moment().to(torch.float64, copy=True)
        C.diagonal().add_(spec.ridge)  # (n, n) C + lambda I, with no identity and no second temporary
    if scale is None:
        total = spec.total_energy + spec.residual
        scale = 1.0 / total if total > 0 else 0.0
    return LayerMetric(C, output_gram, scale)


def calibrated_bytes_plan(calib: Calibration, policy: Policy, priced: dict) -> dict:
    """The joint plan of ``policy`` (``cost="bytes"``) with every layer priced on the calibration inputs; ``priced``
    memoises the candidates by what they depend on (allowed precisions, rank multiple, overrides), so a sweep of
    budgets prices each layer once.

    Predicted errors add truncation and rounding approximately; so where the plain alternative "every layer
    rounded, none factored" also fits the budget, both are built and their drift measured on the calibration
    batches, and the one that drifts less is returned (``plan["selection"]["checked"]`` records both). A joint
    plan is then never worse than rounding alone on the inputs it was fitted to."""
    key = (policy.allowed_precisions, policy.multiple, policy.overrides, id(calib.sensitivity))
    if key not in priced:
        metrics = {s.name: layer_metric(calib, s.name) for s in calib.todo}
        priced[key] = price_sites(calib.model, calib.found.sites, calib.spectra, policy, metrics=metrics)
    sites, found = calib.found.sites, priced[key]
    joint = bytes_plan(calib.model, sites, calib.spectra, policy, method=calib.method, priced=found)
    plain = uniform_rounding_plan(sites, calib.spectra, found, layer_budget(sites, found, policy),
                                  policy=policy.to_dict(), method=calib.method)
    if plain is None or all(plain["sites"][n] == joint["sites"][n] for n in joint["sites"]):
        return joint
    drift = {which: calib.drift_of(p) for which, p in (("joint", joint), ("rounding", plain))}
    best = plain if drift["rounding"] < drift["joint"] else joint
    best["selection"]["checked"] = {"on": "calibration batches", "metric": "relative_l2", **drift}
    return best


def calibrated_latency_plan(calib: Calibration, policy: Policy, example) -> dict:
    """The plan of ``policy`` (``cost="latency"``) with errors priced on the calibration inputs and time measured
    on ``example`` (:func:`factorize.measure.latency.latency_plan`)."""
    metrics = {s.name: layer_metric(calib, s.name) for s in calib.todo}
    return latency_plan(calib.model, calib.found.sites, calib.spectra, policy, example, method=calib.method,
                        metrics=metrics)


def hessians(calib: Calibration) -> dict[str, torch.Tensor]:
    """name -> input second moment C (n x n), for error-feedback rounding when the plan is applied (layers whose
    second moment is a diagonal, embeddings, are rounded without it; output-side layers with the diagonal of C)."""
    return {name: st.moment_diagonal() if st.is_output_side else st.moment() for name, st in calib.stats.items()
            if not st.is_diagonal}
