"""Rank and stored precision chosen together: every form a layer can take, priced and with its predicted error.

A layer's weight matrix view W (m x n) can be kept

* **dense** at a precision p (:data:`factorize.rounding.PRECISIONS`): cost ``stored_bytes(p, (m, n))``;
* **factored** at rank r with both factors at p: cost ``stored_bytes(p, (m, r)) + stored_bytes(p, (r, n))``;
* **corrected**: rounded to a 4-bit precision p plus a rank-k correction in bfloat16 fitted to what rounding lost
  (LQER, Zhang, Cheng, Constantinides & Zhao, ICML 2024): cost ``stored_bytes(p, (m, n)) + 2 k (m + n)``.

**Predicted error.** Every candidate's error is in the units of the layer's spectrum, so truncation and rounding
add up and the joint planner (:mod:`factorize.plan.joint`) can trade one against the other across layers:

* plain spectra (no calibration): ||dW||_F^2, scaled by 1 / ||W||_F^2 (each layer's error relative to its own
  energy, as the rank-only allocator does);
* calibrated spectra: trace(G' dW C' dW^T) with C' = C + lambda I the input second moment and G' = G + mu I the
  output Gram matrix (identity without output weighting), exactly the measure of
  :mod:`factorize.calibrated.aware` (the Gauss-Newton / K-FAC approximation of the final-output error), scaled as
  the calibrated allocator scales it.

Truncation error at rank r is the spectrum's own predicted error (Eckart-Young-Mirsky, or the whitened
reduced-rank regression's discarded energy). Rounding a dense matrix is priced exactly: the matrix is rounded
(error-feedback rounding, GPTQ, Frantar et al. 2023, when C is known) and :func:`factorize.rounding.weighted_error`
is taken. Rounding the factors is priced per rank-one term from one rounding at the largest candidate rank: with
B = [b_i], A = [a_i^T], and dB, dA what rounding changed, the error of the first r terms is approximately

    sum_{i <= r}  (db_i^T G' db_i)(a_i^T C' a_i) + (b_i^T G' b_i)(da_i^T C' da_i),

exact when the terms are orthogonal in the two metrics (the whitened directions are: that is what the whitened SVD
gives) and the rounding errors of different terms are uncorrelated; the cross term dB dA is of second order.
The correction's error at rank k is the energy the whitened rounding error keeps beyond its first k singular
values (Eckart-Young-Mirsky applied to G'^{1/2} E L).

Predicted errors are no guarantee: the report measures drift on the user's inputs, and beside it the plain
alternatives (rounding alone, rank alone) at the same stored size.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
import torch

from factorize.errors import FactorizeError
from factorize.model.sites import Site
from factorize.plan.entries import CORRECTED, DENSE, FACTOR
from factorize.plan.joint import Candidate
from factorize.plan.policy import DEFAULT_PRECISIONS, check_precisions  # noqa: F401 - re-exported
from factorize.rounding import (
    fits,
    is_float,
    round_factors,
    round_matrix,
    stored_bytes,
    weighted_error,
)
from factorize.spectra.decompose import Spectrum
from factorize.spectra.whiten import sqrt_factor

CORRECTION_RANKS = (8, 16, 32, 64)  # ranks of the rounded-plus-correction form (capped at min(m, n) / 4)
CORRECTION_PRECISION = "bfloat16"  # the correction's factors (LQER keeps them in high precision)
RANK_POINTS = 24  # candidate ranks per precision and layer (plus the multiples the policy asks for)
KINDS_WITH_CORRECTION = ("linear",)  # the corrected form is built for stock nn.Linear layers
VIEW_KINDS = ("linear", "transposed", "conv1d", "conv2d", "conv3d")  # thin layers hold the matrix view's rows
DENSE_VIEW_KINDS = ("linear", "conv1d", "conv2d", "conv3d")  # the weight's own rows are the matrix view's rows
NATIVE = {torch.float32: "float32", torch.bfloat16: "bfloat16", torch.float16: "float16"}
_WIDTH = {"float32": 32, "bfloat16": 16, "float16": 16, "int8": 8, "int4g32": 4, "int4g64": 4, "int4g128": 4}


def native_precision(dtype: torch.dtype) -> str:
    """The precision a weight of ``dtype`` is stored in now (float64 and others count as float32)."""
    return NATIVE.get(dtype, "float32")


def usable(precisions: Sequence[str], native: str) -> tuple[str, ...]:
    """The native precision first, then every allowed one that stores fewer bits than it."""
    return (native, *[p for p in precisions if _WIDTH[p] < _WIDTH[native]])


def dense_shape(kind: str, shape: tuple[int, int]) -> tuple[int, int]:
    """The (rows, columns) a dense layer of ``kind`` stores and rounds by (its scales are per stored row): the matrix
    view's own for linear and convolution weights, its transpose for the others (a transposed projection's (in, out)
    weight, an embedding, a transposed convolution; see :func:`_rounded_as_stored`)."""
    return shape if kind in DENSE_VIEW_KINDS else (shape[1], shape[0])


def factor_bytes(precision: str, shape: tuple[int, int], rank: int) -> int:
    m, n = shape
    return stored_bytes(precision, (m, rank)) + stored_bytes(precision, (rank, n))


def corrected_bytes(precision: str, shape: tuple[int, int], rank: int) -> int:
    m, n = shape
    return stored_bytes(precision, shape) + rank * (m + n) * 2  # bfloat16 correction factors


class LayerMetric:
    """The error measure of one layer: trace(G dW C dW^T) * scale (G, C optional), and its square-root factors."""

    def __init__(self, hessian: torch.Tensor | None, output_gram: torch.Tensor | None, scale: float) -> None:
        self.C = None if hessian is None else hessian.detach().to(torch.float64)
        self.G = None if output_gram is None else output_gram.detach().to(torch.float64)
        self.scale = float(scale)
        self._roots: tuple | None = None  # (L, R), found on first use and kept: they do not depend on E

    def error(self, W: torch.Tensor, Wq: torch.Tensor) -> float:
        return self.scale * weighted_error(W, Wq, self.C, output_gram=self.G)

    def left(self, X: torch.Tensor) -> torch.Tensor:  # (m, k) -> G X
        return X if self.G is None else self.G @ X

    def right(self, Y: torch.Tensor) -> torch.Tensor:  # (k, n) -> Y C
        return Y if self.C is None else (Y * self.C if self.C.dim() == 1 else Y @ self.C)

    def whitened(self, E: torch.Tensor) -> torch.Tensor:
        """R^T E L with C + lam I = L L^T and G = R R^T (both optional; lam = 1e-9 x the mean of diag C), whose
        singular values are those of G^{1/2} E C^{1/2}: ||R^T E L||_F^2 = trace(G E C E^T). Cholesky factors (the
        symmetric square root where Cholesky fails; :func:`factorize.spectra.whiten.sqrt_factor`), found once per
        layer: each layer prices one correction per integer precision, and eigendecompositions per call were a
        quarter of a calibrated shrink's plain alternatives."""
        if self._roots is None:
            L = R = None
            if self.C is not None:
                lam = 1e-9 * float(self.C.mean().clamp_min(1e-300) if self.C.dim() == 1 else
                                   self.C.diagonal().mean().clamp_min(1e-300))
                L = (self.C + lam).sqrt() if self.C.dim() == 1 else sqrt_factor(self.C, lam)
            if self.G is not None:
                R = sqrt_factor(self.G, 0.0)
            self._roots = (L, R)
        L, R = self._roots
        Z = E if L is None else (E * L if L.dim() == 1 else E @ L)  # (m, n)
        return Z if R is None else R.T @ Z


def candidates_for(
    site: Site,
    W: torch.Tensor,
    spectrum: Spectrum,
    precisions: Sequence[str],
    metric: LayerMetric,
    *,
    multiple: int = 1,
    reasons: dict[str, str] | None = None,
) -> list[Candidate]:
    """Every candidate form of one layer, with bytes and predicted error (see the module docstring).

    A precision that cannot hold the weight or its factors (a value beyond float16's range, a 4-bit group scale
    that would overflow) is not offered; ``reasons``, when given, receives precision -> why.

    ``W`` is the layer's matrix view (m x n). Where the stored weight's rows are not the view's rows (a transposed
    projection's dense weight, an embedding, a transposed convolution) rounding does not use the input statistics,
    as :mod:`factorize.rewrite.forms` does when it builds the layer.
    """
    shape = (int(W.shape[0]), int(W.shape[1]))
    native = native_precision(W.dtype)
    W64 = W.detach().to(torch.float64)
    hessian = metric.C if site.kind in DENSE_VIEW_KINDS else None
    out: list[Candidate] = [Candidate(DENSE, native, None, float(stored_bytes(native, shape)), 0.0)]
    reasons = {} if reasons is None else reasons
    for p in usable(precisions, native)[1:]:
        why = fits(W, p)
        if why is not None:
            reasons[p] = f"the weight, {why}"
            continue
        Wq = _rounded_as_stored(W64, p, hessian, site.kind)
        out.append(Candidate(DENSE, p, None, float(stored_bytes(p, dense_shape(site.kind, shape))),
                             metric.error(W64, Wq)))
        if site.kind in KINDS_WITH_CORRECTION and not is_float(p):
            out += _corrected(W64, Wq, p, shape, metric)
    factor_hessian = metric.C if site.kind in VIEW_KINDS else None
    out += _factored(site, W64, spectrum, usable(precisions, native), metric, multiple, factor_hessian, reasons)
    return out


def _rounded_as_stored(W64: torch.Tensor, p: str, hessian, kind: str) -> torch.Tensor:
    """The matrix view as the layer will store it rounded (:mod:`factorize.rewrite.forms`): with the view's rows
    and the input statistics for linear and convolution weights; for the others (a transposed projection, an
    embedding, a transposed convolution) the stored weight is the view's transpose, rounded to nearest by its own
    rows, so that is what is priced."""
    if kind in DENSE_VIEW_KINDS:
        return round_matrix(W64, p, hessian=hessian).dequantize(torch.float64)
    return round_matrix(W64.T, p).dequantize(torch.float64).T


def _corrected(W64, Wq, p, shape, metric: LayerMetric) -> list[Candidate]:
    s = torch.linalg.svdvals(metric.whitened(W64 - Wq))  # Eckart-Young on the whitened rounding error
    tail = np.maximum(float((s * s).sum()) - np.concatenate([[0.0], np.cumsum((s * s).numpy())]), 0.0)
    ranks = [k for k in CORRECTION_RANKS if k <= min(shape) // 4]
    return [Candidate(CORRECTED, p, k, float(corrected_bytes(p, shape, k)), metric.scale * float(tail[k]))
            for k in ranks]


def candidate_ranks(site: Site, spectrum: Spectrum, multiple: int) -> list[int]:
    """Ranks worth pricing: up to the break-even rank (and what the spectrum holds vectors for), on a geometric
    grid of :data:`RANK_POINTS` points, rounded to ``multiple``."""
    top = min(site.break_even - 1, spectrum.vector_rank)
    if top < 1:
        return []
    grid = np.unique(np.round(np.geomspace(1, top, RANK_POINTS)).astype(int))
    if multiple > 1:
        grid = np.unique([max(multiple, (int(r) // multiple) * multiple) for r in grid])
    return [int(r) for r in grid if 1 <= r <= top]


def _factored(site, W64, spectrum, precisions, metric: LayerMetric, multiple, hessian, reasons) -> list[Candidate]:
    ranks = candidate_ranks(site, spectrum, multiple)
    if not ranks:
        return []
    top = ranks[-1]
    B, A = (t.detach().to(torch.float64) for t in spectrum.factors(top))  # (m, top), (top, n)
    errors = spectrum.errors() ** 2  # truncation error at every rank (absolute units of the spectrum)
    out = []
    for p in precisions:
        why = None if p == precisions[0] else fits(B, p) or fits(A, p)
        if why is not None:
            reasons[p] = "; ".join(filter(None, (reasons.get(p), f"the factors, {why}")))
            continue
        terms = np.zeros(top) if p == precisions[0] else _rounding_terms(B, A, p, metric, hessian)
        cum = np.concatenate([[0.0], np.cumsum(terms)])
        for r in ranks:
            err = metric.scale * (float(errors[min(r, len(errors) - 1)]) + float(cum[r]))
            out.append(Candidate(FACTOR, p, r, float(factor_bytes(p, tuple(site.shape), r)), err))
    return out


def _rounding_terms(B, A, p, metric: LayerMetric, hessian) -> np.ndarray:
    """Per rank-one term, the error its rounding adds (see the module docstring; B and A fit in p)."""
    Bq, Aq = round_factors(B, A, p, hessian=hessian)
    dB, dA = B - Bq.dequantize(torch.float64), A - Aq.dequantize(torch.float64)  # (m, k), (k, n)
    b_norm, db_norm = (B * metric.left(B)).sum(0), (dB * metric.left(dB)).sum(0)  # (k,) in G
    a_norm, da_norm = (A * metric.right(A)).sum(1), (dA * metric.right(dA)).sum(1)  # (k,) in C
    return (db_norm * a_norm + b_norm * da_norm).clamp_min(0).numpy()


def candidate_bytes(chosen: Candidate, shape: tuple[int, int], kind: str = "linear") -> int:
    """Stored bytes of a candidate form of an (m, n) matrix view of a layer of ``kind``, whatever its ``cost``
    counts."""
    if chosen.form == FACTOR:
        return factor_bytes(chosen.precision, shape, chosen.rank)
    if chosen.form == CORRECTED:
        return corrected_bytes(chosen.precision, shape, chosen.rank)
    return stored_bytes(chosen.precision, dense_shape(kind, shape))


def entry_for(site: Site, chosen: Candidate, reason: str, spectrum: Spectrum | None, native: str,
              scale: float = 1.0, cost: str = "bytes", notes: Sequence[str] = ()) -> dict:
    """One plan row for a chosen candidate: the rank-only row's keys, plus ``precision``, ``bytes``, ``bytes_after``
    (and ``correction_rank`` / ``correction_precision`` for the corrected form; ``latency_ms`` when the budget
    counted measured time; ``notes`` when a precision was refused for this layer, saying why)."""
    shape = tuple(site.shape)
    factor = chosen.form == FACTOR
    entry = {
        "kind": site.kind,
        "shape": list(shape),
        "rank": chosen.rank if factor else None,
        "action": chosen.form,
        "reason": reason,
        "params": site.params,
        "params_after": site.factored_params(chosen.rank) if factor else site.params,
        "precision": chosen.precision,
        "bytes": stored_bytes(native, shape),
        "bytes_after": candidate_bytes(chosen, shape, site.kind),
        "predicted_error": _relative(chosen.error, scale, spectrum),
    }
    if cost == "latency":
        entry["latency_ms"] = float(chosen.cost)
    if chosen.form == CORRECTED:
        entry.update(correction_rank=chosen.rank, correction_precision=CORRECTION_PRECISION,
                     params_after=site.params + chosen.rank * sum(shape))
    if site.kernel:
        entry["kernel"] = list(site.kernel)
    if spectrum is not None and factor:
        entry["energy_kept"] = spectrum.energy_fraction(chosen.rank)
    if notes:
        entry["notes"] = list(notes)
    return entry


def _relative(error: float, scale: float, spectrum: Spectrum | None) -> float:
    """A candidate's error as a relative error, sqrt(error / ||W||^2) in the spectrum's metric (as rank-only plans
    record ``predicted_error``)."""
    total = getattr(spectrum, "total_energy", 0.0) + getattr(spectrum, "residual", 0.0)
    return math.sqrt(max(error / scale, 0.0) / total) if spectrum is not None and total > 0 and scale > 0 else 0.0


def byte_budget(sites: Sequence[Site], dtypes: Mapping[str, torch.dtype], budget: float) -> float:
    """``budget`` as bytes: that fraction of the sites' weights as they are stored now."""
    if not 0 < budget <= 1 or not math.isfinite(budget):
        raise FactorizeError(f"budget={budget!r} is not a fraction in (0, 1]",
                             fix="e.g. budget=0.25 for 1/4 of the bytes")
    return budget * sum(stored_bytes(native_precision(dtypes[s.name]), tuple(s.shape)) for s in sites)


@dataclass(frozen=True)
class Priced:
    """Every site's candidates (name -> list), its own precision and its error scale: what one budget's plan
    needs, computed once for many budgets."""

    candidates: Mapping[str, Sequence[Candidate]]
    natives: Mapping[str, str]
    scales: Mapping[str, float]
    notes: Mapping[str, Sequence[str]] = field(default_factory=dict)  # name -> why a precision was not offered


def joint_plan(
    sites: Sequence[Site],
    priced: Priced,
    spectra: Mapping[str, Spectrum],
    budget_cost: float,
    *,
    policy: Mapping,
    method: str,
    cost: str = "bytes",
) -> dict:
    """The plan (same schema as :func:`factorize.plan.ranks.choose_ranks`'s, every row with its precision and
    bytes) that keeps the summed predicted error least with the sites' cost (stored bytes, or measured time)
    within ``budget_cost``.
    Sites without candidates (a weight shared by several modules) stay dense as they are."""
    from factorize.plan.joint import solve

    selection = solve(priced.candidates, budget_cost)
    why = (f"{cost} budget: least predicted error over {sum(len(c) for c in priced.candidates.values())} "
           f"candidate forms{'' if selection.exact else ' (within the certified gap)'}")
    return plan_of(sites, selection.chosen, priced, spectra, why, policy=policy, method=method,
                   selection={"exact": selection.exact, "cost": cost, cost: selection.cost,
                              f"budget_{cost}": budget_cost, "predicted_error": selection.error})


def plan_of(sites: Sequence[Site], chosen: Mapping[str, Candidate], priced: Priced, spectra: Mapping[str, Spectrum],
            why: str, *, policy: Mapping, method: str, selection: Mapping) -> dict:
    """The plan dict for one chosen candidate per priced site (plan version 2); sites without a candidate (a weight
    shared by several modules) stay dense as they are."""
    from factorize.plan.ranks import PLAN_FORMAT, PRECISION_PLAN_VERSION

    cost = selection.get("cost", "bytes")
    entries = {}
    for s in sites:
        native = priced.natives[s.name]
        if s.name in chosen:
            entries[s.name] = entry_for(s, chosen[s.name], why, spectra.get(s.name), native,
                                        priced.scales.get(s.name, 1.0), cost, priced.notes.get(s.name, ()))
        else:
            kept = Candidate(DENSE, native, None, float(stored_bytes(native, tuple(s.shape))), 0.0)
            entries[s.name] = entry_for(s, kept, f"weight shared with {', '.join(s.tied_with)}; kept as it is",
                                        None, native)
    return {"format": PLAN_FORMAT, "version": PRECISION_PLAN_VERSION, "method": method, "policy": dict(policy),
            "sites": entries, "selection": dict(selection)}


def bytes_plan(
    model: torch.nn.Module,
    sites: Sequence[Site],
    spectra: Mapping[str, Spectrum],
    policy,
    *,
    method: str,
    metrics: Mapping[str, LayerMetric] | None = None,
    priced: Priced | None = None,
) -> dict:
    """The joint plan of rank and stored precision for ``policy`` (``cost="bytes"``): the candidates of every site
    (:func:`price_sites`, or ``priced`` from an earlier call), then :func:`joint_plan` under ``policy.budget`` of
    the sites' stored bytes."""
    priced = priced or price_sites(model, sites, spectra, policy, metrics=metrics)
    return joint_plan(sites, priced, spectra, layer_budget(sites, priced, policy), policy=policy.to_dict(),
                      method=method)


def layer_budget(sites: Sequence[Site], priced: Priced, policy) -> float:
    """The bytes the priced sites may take: ``policy.budget`` of every site's bytes, less the sites kept as they
    are (tied weights)."""
    total = sum(stored_bytes(priced.natives[s.name], tuple(s.shape)) for s in sites)
    fixed = sum(stored_bytes(priced.natives[s.name], tuple(s.shape)) for s in sites if s.name not in priced.candidates)
    return policy.budget * total - fixed


def price_sites(model: torch.nn.Module, sites: Sequence[Site], spectra: Mapping[str, Spectrum], policy, *,
                metrics: Mapping[str, LayerMetric] | None = None) -> Priced:
    """The candidates of every site not tied to another (:func:`candidates_for`; ``metrics`` name ->
    :class:`LayerMetric`, default each layer's own relative weight error). Overrides: ``dense=True`` keeps a layer
    as it is, ``rank=N`` factors it at rank N in its own precision."""
    from factorize.model.sites import get_module, matrix_of

    natives, cands, scales, notes = {}, {}, {}, {}
    for s in sites:
        W = matrix_of(get_module(model, s.name), s.kind)
        natives[s.name] = native_precision(W.dtype)
        if s.tied_with:
            continue
        cands[s.name], scales[s.name], refused = price_site(s, W, spectra[s.name], policy,
                                                            (metrics or {}).get(s.name))
        if refused:
            notes[s.name] = refused
    return Priced(cands, natives, scales, notes)


def price_site(site: Site, W: torch.Tensor, spec: Spectrum, policy,
               metric: LayerMetric | None = None) -> tuple[list[Candidate], float, list[str]]:
    """One site's candidates (:func:`candidates_for`, then the policy's overrides), its error scale and the notes
    on precisions not offered -- what :func:`price_sites` records per site, and what the weights-only shrink
    computes per matrix in its tasks. ``metric`` defaults to the layer's own relative weight error."""
    metric = metric or LayerMetric(None, None, _own_scale(spec))
    refused: dict[str, str] = {}
    found = candidates_for(site, W, spec, policy.allowed_precisions, metric, multiple=policy.multiple,
                           reasons=refused)
    cands = _overridden(site, policy, found, native_precision(W.dtype), spec, metric)
    return cands, metric.scale, [f"{p} not offered for {why}; kept in a wider precision" for p, why in refused.items()]


def _own_scale(spec: Spectrum) -> float:
    return 1.0 / spec.total_energy if spec.total_energy > 0 else 0.0


def _overridden(site: Site, policy, cands: list[Candidate], native: str, spec: Spectrum,
                metric: LayerMetric) -> list[Candidate]:
    import fnmatch

    o = next((o for o in policy.overrides if fnmatch.fnmatchcase(site.name, o.pattern)), None)
    if o is None:
        return cands
    if o.dense:
        return [c for c in cands if c.form == DENSE and c.precision == native]
    if o.rank is None:
        raise FactorizeError(f"override {o.pattern!r}: with cost='bytes' an override keeps a layer dense or sets its "
                             "rank", fix="use dense=True or rank=N in the override, or cost='params'")
    r = min(o.rank, spec.computed_rank)
    err = float(spec.errors()[r]) ** 2 * metric.scale
    return [Candidate(FACTOR, native, r, float(factor_bytes(native, tuple(site.shape), r)), err)]


def uniform_rounding_plan(sites: Sequence[Site], spectra: Mapping[str, Spectrum], priced: Priced, budget_cost: float,
                          *, policy: Mapping, method: str) -> dict | None:
    """The plain alternative "every layer rounded, none factored": all priced sites dense at the most precise
    allowed integer precision whose bytes fit ``budget_cost`` (None when none fits). Built from the same priced
    candidates, so it is a plan of the same schema the joint planner could have chosen."""
    by_bits = sorted({c.precision for cs in priced.candidates.values() for c in cs
                      if c.form == DENSE and not is_float(c.precision)},
                     key=lambda p: (-_WIDTH[p], p))
    for p in by_bits:
        chosen = {}
        for name, cs in priced.candidates.items():
            match = [c for c in cs if c.form == DENSE and c.precision == p]
            if not match:
                break
            chosen[name] = match[0]
        else:
            if math.fsum(c.cost for c in chosen.values()) <= budget_cost:
                why = f"every layer rounded to {p}, none factored (the plain alternative)"
                return plan_of(sites, chosen, priced, spectra, why, policy=policy, method=method,
                               selection={"exact": True, "cost": "bytes",
                                          "bytes": math.fsum(c.cost for c in chosen.values()),
                                          "budget_bytes": budget_cost,
                                          "predicted_error": math.fsum(c.error for c in chosen.values())})
    return None
