"""Compress inside a plain PyTorch training loop: a few functions and one small schedule object, not a framework.

* :func:`compress_in_training` compresses the model **in place** mid-training and returns a new optimizer of the
  same type, with every param group's options copied, over the new parameters. Parameters that were kept (every
  layer not rewritten) keep their optimizer state; so does the bias of a rewritten layer (it has the same shape
  and meaning). The thin factors start with fresh state.
* :func:`refactor` chooses new ranks for a model that may already hold factored layers (for example to lower
  the budget again): a factored layer is re-truncated from its own product ``B @ A`` and never grows.
* :func:`merge_in_training` merges every factored layer back to one dense layer, again returning a rebuilt
  optimizer.
* :class:`ProgressiveSchedule` lowers the budget step by step at given epochs (progressive compression); the
  recovery epochs between steps are simply the user's own training loop.

Re-truncating thin factors cheaply (Golub & Van Loan, Matrix Computations, 4th ed., 2013: thin QR, SVD): with
B (m x r) and A (r x n), take thin QRs ``B = Q_b R_b`` and ``A^T = Q_a R_a``; then ``B A = Q_b (R_b R_a^T) Q_a^T``
and the SVD of the small r x r core ``R_b R_a^T = U_c S V_c^T`` gives the SVD of the product,
``U = Q_b U_c``, ``V = Q_a V_c``, in O((m + n) r^2) time without forming the m x n matrix. By Eckart-Young-Mirsky
its truncation is the best lower-rank approximation of the layer as it stands.

Typical loop::

    schedule = factorize.ProgressiveSchedule(budgets=[0.8, 0.65, 0.5], epochs=[2, 4, 6])
    for epoch in range(8):
        optimizer = schedule.step(epoch, model, optimizer)  # compresses at epochs 2, 4, 6
        train_one_epoch(model, optimizer)                   # also the recovery between steps
    factorize.checkpoints.files.save(model, "model.safetensors", plan=schedule.plan)

Learning rate after compressing: a step on the factors moves the product by about
``-lr (B B^T G + G A^T A)`` (G the gradient with respect to W), and with the singular values split evenly between
B and A (see :meth:`factorize.Spectrum.factors`) that is roughly ``2 s_1`` times the dense step for a layer with
largest singular value ``s_1`` -- so a learning rate that was stable for the dense model may need lowering
(in our digits test SGD at lr 0.2 with momentum diverged after compression, lr 0.05 did not).

An LR scheduler holds a reference to the old optimizer: build a new one for the returned optimizer (or set
``scheduler.optimizer = optimizer``). Discard the old optimizer.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import torch
from torch import nn

from factorize.errors import FactorizeError
from factorize.model.count import count_parameters
from factorize.model.sites import Site, WalkResult, get_module, set_module, walk
from factorize.pipeline import compress
from factorize.plan.entries import FACTOR, factored_ranks, is_factored_entry
from factorize.plan.policy import POLICY_KEYS, Policy, resolve_policy
from factorize.plan.ranks import choose_ranks
from factorize.rewrite.apply import CompressResult, merge
from factorize.rewrite.kinds import layer_kind
from factorize.rewrite.layers import Factored, at_rank, factor_module, factored_layers
from factorize.spectra.decompose import Spectrum, compute_dtype_for
from factorize.spectra.sites import decompose_sites

# ---------------------------------------------------------------------------------------------------------------
# spectrum of a factored layer, and a factored layer at a lower rank


@torch.no_grad()
def factored_spectrum(layer: Factored, *, precision: str | None = None) -> Spectrum:
    """Singular spectrum of a factored layer's product ``B @ A`` from thin QRs of its factors (module docstring).

    The product has rank at most r, so the r singular values returned are all of its nonzero ones
    (``exact=True``): ``errors()`` and ``factors(k)`` behave as for a dense layer's spectrum.
    """
    B = layer.factor_b().detach()  # (m, r)
    dtype = compute_dtype_for(B, precision)
    B = B.to(dtype)
    A = layer.factor_a().detach().to(dtype)  # (r, n)
    Qb, Rb = torch.linalg.qr(B)  # (m, r), (r, r)
    Qa, Ra = torch.linalg.qr(A.T)  # (n, r), (r, r)
    Uc, S, Vhc = torch.linalg.svd(Rb @ Ra.T)  # core (r, r)
    U, Vh = Qb @ Uc, Vhc @ Qa.T  # (m, r), (r, n)
    total = float((S.to(torch.float64) ** 2).sum())
    return Spectrum(U, S, Vh, total_energy=total, method="exact", exact=True)


def _factored_site(name: str, layer: Factored) -> Site:
    m, n = int(layer.factor_b().shape[0]), int(layer.factor_a().shape[1])
    kernel = layer_kind(layer.kind).kernel(layer)
    return Site(name=name, kind=layer.kind, shape=(m, n), params=m * n, has_bias=layer.second.bias is not None,
                dtype=str(layer.second.weight.dtype).removeprefix("torch."), kernel=kernel)


# ---------------------------------------------------------------------------------------------------------------
# re-choosing ranks on a model that may already be factored


def _module_order(model: nn.Module) -> dict[str, int]:
    return {name: i for i, (name, _) in enumerate(model.named_modules())}


def _keep_current(entry: dict, rank: int, site: Site) -> None:
    entry.update(rank=rank, action=FACTOR, params_after=site.factored_params(rank),
                 reason=f"already factored at rank {rank}; a factored layer is never grown, kept")
    entry["predicted_error"], entry["energy_kept"] = 0.0, 1.0


def refactor(
    model: nn.Module,
    policy: Policy | None = None,
    *,
    precision: str | None = None,
    **keywords: Any,
) -> CompressResult:
    """Choose new ranks for ``model`` **in place**, where some layers may already be factored.

    Every factored layer is a site of its original shape (m x n), its spectrum taken from its product
    (:func:`factored_spectrum`); dense layers matching ``include``/``exclude`` are sites as in
    :func:`factorize.compress`. One policy covers both, so ``budget=f`` is a fraction of the original dense
    parameters of all those sites. A factored layer only ever shrinks: where the policy would give it its current
    rank or more (or dense), it is kept as it is. ``predicted_error`` of a re-truncated layer is measured against
    its previous factors, not against the original weight. All new layers are built before any is swapped in, so
    a failure leaves the model as it was.

    Returns a :class:`factorize.CompressResult` whose ``plan`` describes the whole model (every factored layer),
    ready for :func:`factorize.checkpoints.files.save`.

    ``policy`` is a :class:`~factorize.plan.policy.Policy`, or its keywords as for :func:`factorize.compress`
    (``method`` defaults to ``"exact"`` here). ``cost="macs"`` is refused: there is no sample input to count
    multiply-accumulates on.
    """
    if not isinstance(model, nn.Module):
        raise FactorizeError(f"expected a torch.nn.Module, got {type(model).__name__}", fix="pass the model object")
    policy = resolve_policy(policy, keywords if policy is not None else {"method": "exact", **keywords})
    if policy.cost == "macs":
        raise FactorizeError("refactor cannot budget multiply-accumulates: it has no sample input to count them on",
                             fix="use cost='params', or compress(model, cost='macs', example=batch) on a dense model")
    method = policy.method
    factored = factored_layers(model)
    found = walk(model, include=policy.include, exclude=list(policy.exclude or []) + [f"{n}.*" for n in factored])
    order = _module_order(model)
    sites = sorted([_factored_site(n, layer) for n, layer in factored.items()] + found.sites,
                   key=lambda s: order[s.name])
    if not sites:
        raise FactorizeError("no factorizable or factored layer found",
                             [f"{s.name}: {s.reason}" for s in found.skipped],
                             fix="check the include/exclude globs against model.named_modules()")
    spectra = {n: factored_spectrum(layer, precision=precision) for n, layer in factored.items()}
    spectra.update(decompose_sites(model, [s for s in found.sites if not s.tied_with], method=method,
                                   seed=policy.seed, precision=precision))
    plan = choose_ranks(sites, spectra, policy, method=method)
    params_before = count_parameters(model)
    by_name = {s.name: s for s in sites}
    replacements: dict[str, nn.Module] = {}
    for name, entry in plan["sites"].items():
        current = factored.get(name)
        if current is not None and (not is_factored_entry(entry) or entry["rank"] >= current.rank):
            _keep_current(entry, current.rank, by_name[name])
        elif is_factored_entry(entry):
            B, A = spectra[name].factors(entry["rank"])  # (m, r), (r, n)
            module = get_module(model, name)
            replacements[name] = (at_rank(current, B, A) if current is not None
                                  else factor_module(module, by_name[name].kind, B, A))
    for name, layer in replacements.items():
        set_module(model, name, layer)
    return CompressResult(model=model, plan=plan, sites=WalkResult(sites=sites, skipped=found.skipped),
                          spectra=spectra, params_before=params_before, params_after=count_parameters(model))


# ---------------------------------------------------------------------------------------------------------------
# rebuilding the optimizer


def _weights_and_bias(module: nn.Module) -> tuple[list[nn.Parameter], nn.Parameter | None]:
    """The weight parameter(s) and the bias of a dense or factored layer."""
    if isinstance(module, Factored):
        return [module.first.weight, module.second.weight], module.second.bias
    bias = getattr(module, "bias", None)
    return [module.weight], bias if isinstance(bias, nn.Parameter) else None


def _replacement_map(old: Mapping[str, nn.Module], model: nn.Module) -> dict[int, tuple[list[nn.Parameter], bool]]:
    """id(old parameter) -> (new parameters, carry optimizer state), for layers replaced in ``model``.

    New parameters inherit ``requires_grad`` from the ones they replace.
    """
    mapping: dict[int, tuple[list[nn.Parameter], bool]] = {}
    replaced: list[str] = []
    for name, before in old.items():  # parents come before their children in named_modules order
        if not name or any(name.startswith(r + ".") for r in replaced):
            continue
        after = get_module(model, name)
        if after is before:
            continue
        replaced.append(name)
        old_w, old_b = _weights_and_bias(before)
        new_w, new_b = _weights_and_bias(after)
        for p in new_w:
            p.requires_grad_(old_w[0].requires_grad)
        for p in old_w:
            mapping[id(p)] = (new_w, False)
        if old_b is not None and new_b is not None:
            new_b.requires_grad_(old_b.requires_grad)
            mapping[id(old_b)] = ([new_b], old_b.shape == new_b.shape)
    return mapping


def rebuild_optimizer(optimizer: torch.optim.Optimizer,
                      mapping: Mapping[int, tuple[list[nn.Parameter], bool]]) -> torch.optim.Optimizer:
    """A new optimizer of the same type, each param group's options copied, with replaced parameters swapped.

    ``mapping``: id(old parameter) -> (new parameters, whether the old one's state carries over). Every other
    parameter keeps its place and its state (the state tensors are re-used, not copied).
    """
    groups, state, seen = [], {}, set()
    for group in optimizer.param_groups:
        params = []
        for p in group["params"]:
            news, carry = mapping.get(id(p), ([p], True))
            for q in news:
                if id(q) in seen:
                    continue
                seen.add(id(q))
                params.append(q)
                if carry and p in optimizer.state:
                    state[q] = optimizer.state[p]
        groups.append({**{k: v for k, v in group.items() if k != "params"}, "params": params})
    cls = type(optimizer)
    try:
        new = cls(groups, **optimizer.defaults)
    except TypeError:  # an optimizer whose defaults are not all constructor arguments: the groups carry them
        new = cls(groups)
    for q, s in state.items():
        new.state[q] = s
    return new


def _check_optimizer(optimizer: Any) -> None:
    if not isinstance(optimizer, torch.optim.Optimizer):
        raise FactorizeError(f"expected a torch.optim.Optimizer, got {type(optimizer).__name__}",
                             fix="pass the optimizer that trains the model")


def compress_in_training(model: nn.Module, optimizer: torch.optim.Optimizer,
                         **compress_kwargs: Any) -> tuple[CompressResult, torch.optim.Optimizer]:
    """Compress ``model`` in place mid-training and rebuild ``optimizer`` over its new parameters.

    Args:
        model: the model being trained; rewritten in place (factored layers replace dense ones).
        optimizer: its optimizer; not modified. Use the returned one from now on.
        **compress_kwargs: the policy and options of :func:`factorize.compress` (``budget=``, ``rank=``, ...,
            ``calibration=`` where supported). When the model already holds factored layers, :func:`refactor`
            is used instead (its options; no calibration).

    Returns:
        ``(result, optimizer)``: the :class:`factorize.CompressResult` (``result.plan`` for saving) and a new
        optimizer of the same type and options. Kept parameters keep their state (Adam's moments, SGD's
        momentum); a rewritten layer's bias keeps its state; the new factors start fresh.
    """
    _check_optimizer(optimizer)
    if "inplace" in compress_kwargs:
        raise FactorizeError("compress_in_training always works in place", fix="leave out inplace=")
    before = dict(model.named_modules())
    if factored_layers(model):
        if compress_kwargs.get("calibration") is not None:
            raise FactorizeError(
                "the model already holds factored layers, which are re-truncated from their own factors; "
                "calibration is not supported there", fix="leave out calibration= for this step")
        compress_kwargs = {k: v for k, v in compress_kwargs.items() if k not in ("calibration", "progress")}
        result = refactor(model, **compress_kwargs)
    else:
        result = compress(model, inplace=True, **compress_kwargs)
    return result, rebuild_optimizer(optimizer, _replacement_map(before, model))


def merge_in_training(model: nn.Module, optimizer: torch.optim.Optimizer) -> torch.optim.Optimizer:
    """Merge every factored layer of ``model`` back to dense, in place, and return the rebuilt optimizer.

    The merged layer computes the same function (``W = B @ A``); its bias keeps its optimizer state, the dense
    weight starts fresh.
    """
    _check_optimizer(optimizer)
    before = dict(model.named_modules())
    merge(model, inplace=True)
    return rebuild_optimizer(optimizer, _replacement_map(before, model))


# ---------------------------------------------------------------------------------------------------------------
# progressive schedule


class ProgressiveSchedule:
    """Lower the budget step by step at given epochs (progressive compression).

    Call :meth:`step` at the start of every epoch; at each epoch in ``epochs`` it compresses the model to the
    matching budget (a fraction of the original dense parameters of the factorizable layers) and returns the
    rebuilt optimizer, otherwise the optimizer it was given. The epochs in between are the recovery: the user's
    loop simply keeps training. ``plan`` always describes the model as it stands, ready for
    :func:`factorize.checkpoints.files.save`. ``calibration=`` (where supported) applies to the first step only; later
    steps re-truncate the factored layers from their own product.
    """

    def __init__(self, budgets: Sequence[float], epochs: Sequence[int], **compress_kwargs: Any) -> None:
        self.budgets = [float(b) if isinstance(b, (int, float)) and not isinstance(b, bool) else b for b in budgets]
        self.epochs = list(epochs)
        self.compress_kwargs = dict(compress_kwargs)
        self.plan: dict | None = None
        self.history: list[dict] = []  # one entry per compression step taken
        self._next = 0
        self._validate()

    def _validate(self) -> None:
        problems = []
        if not self.budgets or len(self.budgets) != len(self.epochs):
            problems.append(f"got {len(self.budgets)} budgets and {len(self.epochs)} epochs; need the same number >= 1")
        if any(not isinstance(b, float) or not math.isfinite(b) or not 0 < b <= 1 for b in self.budgets):
            problems.append(f"budgets must be fractions in (0, 1], got {self.budgets}")
        elif any(b >= a for a, b in zip(self.budgets, self.budgets[1:])):
            problems.append(f"budgets must decrease step by step, got {self.budgets}")
        if any(isinstance(e, bool) or not isinstance(e, int) or e < 0 for e in self.epochs):
            problems.append(f"epochs must be integers >= 0, got {self.epochs}")
        elif any(b <= a for a, b in zip(self.epochs, self.epochs[1:])):
            problems.append(f"epochs must increase, got {self.epochs}")
        clash = [k for k in (*POLICY_KEYS, "inplace") if k in self.compress_kwargs]
        if clash:
            problems.append(f"the schedule sets the budget itself; remove {', '.join(clash)}")
        if problems:
            raise FactorizeError("invalid progressive schedule", problems,
                                 fix="e.g. ProgressiveSchedule(budgets=[0.8, 0.65, 0.5], epochs=[2, 4, 6])")

    @property
    def done(self) -> bool:
        """True once every step has been taken."""
        return self._next >= len(self.budgets)

    def step(self, epoch: int, model: nn.Module, optimizer: torch.optim.Optimizer) -> torch.optim.Optimizer:
        """Compress when ``epoch`` reaches the next step's epoch; returns the optimizer to use from now on.

        If several steps are due at once (epochs were skipped), only the lowest budget among them is applied.
        """
        due = [i for i in range(self._next, len(self.epochs)) if self.epochs[i] <= epoch]
        if not due:
            return optimizer
        i = due[-1]
        kwargs = dict(self.compress_kwargs)
        if self.history:
            kwargs.pop("calibration", None)
        result, optimizer = compress_in_training(model, optimizer, budget=self.budgets[i], **kwargs)
        self.plan = result.plan
        self._next = i + 1
        sites = result.plan["sites"].values()
        self.history.append({
            "epoch": epoch, "budget": self.budgets[i], "params": result.params_after,
            "site_params_kept": sum(e["params_after"] for e in sites) / max(sum(e["params"] for e in sites), 1),
            "ranks": factored_ranks(result.plan),
        })
        return optimizer
