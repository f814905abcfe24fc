"""Per-layer sensitivity, measured: how much a layer's truncation moves the model's final output.

A spectrum predicts each layer's own error (weight space, or output space when calibrated). Layers differ in
how much of that error reaches the final output: a layer feeding a normalisation or a residual stream may
shrug it off, another may amplify it. Ranks allocated by the layers' own errors alone ignore this.

Probes (in the spirit of ASVD's per-layer sensitivity probing, Yuan et al. 2023): for each site and each probe
rank r, the site alone is replaced by its rank-r truncation (from its spectrum, with the bias correction of an
activation-aware spectrum), the model is run on the probe batches, and the final-output drift d is measured
against the original outputs. Per site, a weight w is fitted by least squares through the origin,

    d(r) ~= w * E(r),   E(r) = the discarded energy of the site's spectrum at rank r (sum_{i>r} s_i^2),

with d = relative_l2^2 (``metric="relative_l2"``, default) or 1 - mean cosine (``metric="cosine"``); both are
to first order proportional to the squared output perturbation, which is what makes the model linear in E.
Assuming errors of different layers add (first order; they interact at large errors), the predicted drift of a
plan is sum_l w_l E_l(r_l): ``error_scale()`` hands the w_l to :func:`factorize.plan.ranks.choose_ranks` /
:func:`factorize.plan.ranks.allocate_budget`, whose greedy step then maximises the predicted drift removed per
parameter (or multiply-accumulate) spent. A robust layer gets little rank; a sensitive one may stay dense.

Cost, stated honestly: one reference pass plus ``len(sites) * len(fractions)`` passes over the probe batches.
Keep the probe set small (a few hundred samples are enough for a per-layer scalar).
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import asdict, dataclass, field
from typing import Any

import torch
from torch import nn
from tqdm.auto import tqdm

from factorize.calibrated.aware import AwareSpectrum
from factorize.errors import FactorizeError
from factorize.measure.drift import output_drift
from factorize.model.feed import feed, primary_output, token_mask
from factorize.model.sites import Site, get_module
from factorize.spectra.decompose import Spectrum

METRICS = ("relative_l2", "cosine")
DEFAULT_FRACTIONS = (0.5, 0.25)  # probe ranks: these fractions of each layer's parameters
WEIGHT_FLOOR = 1e-6  # a measured weight below this fraction of the largest is raised to it (noise, not "free")


@dataclass
class LayerSensitivity:
    """Probes of one site: predicted layer energy removed and measured final drift at each probe rank."""

    name: str
    ranks: list[int]
    layer_energy: list[float]  # discarded spectrum energy E(r) at each probe rank
    drift: list[float]  # measured final-output drift d(r) (see the module docstring)
    weight: float  # fitted w: drift per unit of discarded energy


@dataclass
class Sensitivity:
    """What :func:`measure_sensitivity` found."""

    layers: dict[str, LayerSensitivity] = field(default_factory=dict)
    metric: str = "relative_l2"
    forward_passes: int = 0  # batch forward passes spent (reference included)
    samples: int = 0  # probe samples per pass

    def error_scale(self) -> dict[str, float]:
        """name -> w, for ``choose_ranks(..., error_scale=...)`` (floored so no layer is treated as free)."""
        top = max((ls.weight for ls in self.layers.values()), default=0.0)
        floor = WEIGHT_FLOOR * top if top > 0 else 0.0
        return {name: max(ls.weight, floor) for name, ls in self.layers.items()}

    def predicted_drift(self, spectra: Mapping[str, Spectrum], ranks: Mapping[str, int | None]) -> float:
        """sum_l w_l E_l(r_l) for a plan's ranks (None: dense, no error)."""
        scale = self.error_scale()
        total = 0.0
        for name, r in ranks.items():
            if r is None or name not in scale:
                continue
            spec = spectra[name]
            total += scale[name] * (spec.total_energy - float(spec.kept_energy()[min(r, spec.computed_rank)]))
        return total

    def to_dict(self) -> dict:
        return {"metric": self.metric, "forward_passes": self.forward_passes, "samples": self.samples,
                "layers": {k: asdict(v) for k, v in self.layers.items()}}


def _drift_value(ref: list[torch.Tensor], cand: list[torch.Tensor], masks, metric: str) -> float:
    d = output_drift(ref, cand, kind="features", masks=masks)
    return d["relative_l2"] ** 2 if metric == "relative_l2" else 1.0 - d["cosine_mean"]


def run_outputs(model: nn.Module, batches: Sequence[Any], output_fn: Callable | None = None) -> list[torch.Tensor]:
    """The model's output on every batch (``output_fn(output, batch)`` if given, else the primary output)."""
    outs = []
    was_training = model.training
    model.eval()
    try:
        with torch.no_grad():
            for b in batches:
                o = feed(model, b)
                outs.append((output_fn(o, b) if output_fn is not None else primary_output(o)).detach().float().cpu())
    finally:
        model.train(was_training)
    return outs


class _Swap:
    """Temporarily put a rank-r truncation (and corrected bias) into a layer's weight; restore on exit."""

    def __init__(self, module: nn.Module, kind: str, spectrum: Spectrum, rank: int) -> None:
        self.module, self.kind, self.spectrum, self.rank = module, kind, spectrum, rank

    def __enter__(self) -> None:
        w = self.module.weight
        self.saved_w = w.detach().clone()
        bias = getattr(self.module, "bias", None)
        self.saved_b = bias.detach().clone() if isinstance(bias, torch.Tensor) else None
        Wr = self.spectrum.truncated(self.rank)  # (m, n)
        with torch.no_grad():
            if self.kind in ("embedding", "transposed"):
                w.copy_(Wr.t().to(w.dtype))
            else:
                w.copy_(Wr.reshape(w.shape).to(w.dtype))
            shift = self.spectrum.bias_shift(self.rank) if isinstance(self.spectrum, AwareSpectrum) else None
            if shift is not None and self.saved_b is not None:
                bias.add_(shift.to(bias.dtype).reshape(bias.shape))

    def __exit__(self, *exc) -> None:
        with torch.no_grad():
            self.module.weight.copy_(self.saved_w)
            if self.saved_b is not None:
                self.module.bias.copy_(self.saved_b)


def probe_ranks(site: Site, spectrum: Spectrum, fractions: Sequence[float]) -> list[int]:
    """Probe ranks: each fraction f of the layer's parameters, r = floor(f mn / (m + n)), within the spectrum."""
    out = []
    for f in fractions:
        r = int(f * site.params / (site.shape[0] + site.shape[1]))
        r = max(1, min(r, spectrum.computed_rank - 1 if spectrum.computed_rank > 1 else 1))
        if r not in out:
            out.append(r)
    return out


def measure_sensitivity(
    model: nn.Module,
    sites: Iterable[Site],
    spectra: Mapping[str, Spectrum],
    batches: Iterable[Any],
    *,
    fractions: Sequence[float] = DEFAULT_FRACTIONS,
    metric: str = "relative_l2",
    output_fn: Callable[[Any, Any], torch.Tensor] | None = None,
    progress: bool = False,
) -> Sensitivity:
    """Measure each site's final-output sensitivity with truncation probes (see the module docstring).

    Args:
        model: the original model. Each probe edits one layer's weight in place and restores it, so the model
            is unchanged afterwards (do not run it concurrently elsewhere meanwhile).
        sites: the sites to probe (each needs a spectrum in ``spectra``; tied sites are skipped).
        spectra: plain or activation-aware spectra of those sites.
        batches: probe inputs (batch contract); a few hundred samples suffice.
        fractions: probe ranks as fractions of each layer's parameters.
        metric: ``"relative_l2"`` (drift = relative_l2^2) or ``"cosine"`` (drift = 1 - mean cosine).
        output_fn: ``output_fn(output, batch) -> tensor`` to compare instead of the primary output (e.g. a
            mean-pooled sentence embedding).
        progress: a progress bar on stderr.

    Returns:
        :class:`Sensitivity`; its ``forward_passes`` is 1 + len(sites) * len(probe ranks), times the batches.
    """
    if metric not in METRICS:
        raise FactorizeError(f"unknown drift metric {metric!r}", fix=f"use one of {', '.join(METRICS)}")
    if not fractions or any(not 0 < f < 1 for f in fractions):
        raise FactorizeError(f"probe fractions must lie in (0, 1), got {list(fractions)}")
    batch_list = list(batches)
    if not batch_list:
        raise FactorizeError("no probe batches for the sensitivity measurement", fix="give sample inputs")
    todo = [s for s in sites if s.name in spectra]
    masks = [token_mask(b) for b in batch_list]
    ref = run_outputs(model, batch_list, output_fn)
    result = Sensitivity(metric=metric, forward_passes=len(batch_list), samples=sum(int(o.shape[0]) for o in ref))
    bar = tqdm(total=len(todo), desc="sensitivity", unit="layer", disable=not progress, leave=False)
    try:
        for site in todo:
            spec = spectra[site.name]
            module = get_module(model, site.name)
            ranks, energy, drift = probe_ranks(site, spec, fractions), [], []
            for r in ranks:
                with _Swap(module, site.kind, spec, r):
                    cand = run_outputs(model, batch_list, output_fn)
                result.forward_passes += len(batch_list)
                energy.append(max(spec.total_energy - float(spec.kept_energy()[r]), 0.0))
                drift.append(_drift_value(ref, cand, masks, metric))
            den = sum(e * e for e in energy)
            w = sum(d * e for d, e in zip(drift, energy)) / den if den > 0 else 0.0
            result.layers[site.name] = LayerSensitivity(site.name, ranks, energy, drift, max(w, 0.0))
            bar.update()
    finally:
        bar.close()
    return result
