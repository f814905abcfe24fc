"""The Policy: one object that says how a model is compressed, built from keywords in exactly one place.

A :class:`Policy` holds the rank rule (exactly one of ``rank``, ``energy``, ``keep``, ``budget``, see
:mod:`factorize.plan.ranks`), which layers are considered (``include`` / ``exclude`` globs), per-pattern
exceptions (:class:`Override`), rank rounding (``multiple``), what a budget counts (``cost``), the decomposition
method and the seed of randomized solvers. Every library entry point (``factorize.compress``, the calibrated
pipeline, the drift search, :func:`factorize.training.loop.refactor`, the streaming checkpoint shrink) accepts
either a ready Policy or the keywords of :meth:`Policy.from_keywords`, the only place where those keywords are
declared and where override mappings become :class:`Override` objects.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np

from factorize.choices import AWARE_METHODS, COSTS, METHODS
from factorize.errors import FactorizeError
from factorize.model.sites import Site
from factorize.rounding import PRECISIONS, check_precision

POLICY_KEYS = ("rank", "energy", "keep", "budget")
POLICY_KEYWORDS = (*POLICY_KEYS, "include", "exclude", "overrides", "multiple", "cost", "precisions", "method", "seed")
# int8 and 4-bit in groups of 64 are what practitioners try first (common practice); bfloat16 keeps the float
# range at half the bytes. int4 in groups of 32 costs 0.25 bit a weight more for little (measured on MiniLM:
# held-out cosine 0.9901 against 0.9884, both with error-feedback rounding), so it is allowed but not a default.
DEFAULT_PRECISIONS = ("float32", "bfloat16", "int8", "int4g64")
OVERRIDE_KEYS = ("pattern", "rank", "energy", "keep", "dense")


@dataclass(frozen=True)
class Override:
    """A per-pattern exception to the policy: a fixed ``rank``, ``energy`` or ``keep``, or ``dense=True``."""

    pattern: str  # glob on qualified names (fnmatch rules)
    rank: int | None = None
    energy: float | None = None
    keep: float | None = None
    dense: bool = False


@dataclass(frozen=True)
class Policy:
    """How a model is compressed; exactly one of rank, energy, keep, budget is set.

    ``include`` / ``exclude`` are tuples of glob patterns (a single string is accepted and wrapped); ``method``
    is a decomposition method of :data:`factorize.spectra.decompose.METHODS` or an activation-aware one
    (``"whiten"``, ``"scale"``, which need calibration inputs); ``seed`` seeds randomized solvers.
    """

    rank: int | None = None  # same rank everywhere
    energy: float | None = None  # fraction of sum(s^2) kept per layer, in (0, 1]
    keep: float | None = None  # fraction of each layer's parameters kept, in (0, 1]
    budget: float | None = None  # fraction of all sites' parameters (or MACs) kept, in (0, 1]
    multiple: int = 1  # round ranks to a multiple of this (8 or 16 suit fast kernels)
    cost: str = "params"  # what budget= counts: "params", "macs", "bytes" (stored: rank and precision) or "latency"
    precisions: tuple[str, ...] | None = None  # stored precisions allowed with cost="bytes" (None: the default set)
    overrides: tuple[Override, ...] = field(default_factory=tuple)
    include: tuple[str, ...] | None = None  # only layers matching one of these globs
    exclude: tuple[str, ...] | None = None  # never layers matching one of these globs
    method: str = "auto"  # see factorize.spectra.decompose.METHODS, or "whiten" / "scale"
    seed: int = 0  # for randomized decompositions

    def __post_init__(self) -> None:
        for name in ("include", "exclude"):
            value = getattr(self, name)
            if isinstance(value, str):
                object.__setattr__(self, name, (value,))
            elif value is not None and not isinstance(value, tuple):
                object.__setattr__(self, name, tuple(value))
        if not isinstance(self.overrides, tuple):
            object.__setattr__(self, "overrides", tuple(self.overrides))
        if isinstance(self.precisions, str):
            object.__setattr__(self, "precisions", tuple(p.strip() for p in self.precisions.split(",")))
        elif self.precisions is not None and not isinstance(self.precisions, tuple):
            object.__setattr__(self, "precisions", tuple(self.precisions))
        _validate_policy(self)

    def to_dict(self) -> dict:
        """The policy as recorded in a plan. Only the rank rule, ``multiple``, ``cost`` and ``overrides`` are
        written, exactly as before include/exclude/method/seed joined the Policy: the plan already records the
        method actually used (``plan["method"]``) and the layers selected (``plan["sites"]``), the seed is not
        needed to apply a plan, and saved plans (and the header space reserved for them) stay byte-identical."""
        d = {k: getattr(self, k) for k in (*POLICY_KEYS, "multiple", "cost") if getattr(self, k) is not None}
        if self.overrides:
            d["overrides"] = [{k: v for k, v in asdict(o).items() if v not in (None, False)} for o in self.overrides]
        if self.cost == "bytes":
            d["precisions"] = list(self.allowed_precisions)
        return d

    @property
    def allowed_precisions(self) -> tuple[str, ...]:
        """The stored precisions a ``cost="bytes"`` plan may choose from (see :mod:`factorize.plan.forms`)."""
        return check_precisions(self.precisions)

    @classmethod
    def from_keywords(cls, **keywords: Any) -> Policy:
        """Build a Policy from the keywords of :func:`factorize.compress` that describe it (``POLICY_KEYWORDS``).

        ``overrides`` may hold :class:`Override` objects or mappings with the same keys (``pattern`` and one of
        ``rank`` / ``energy`` / ``keep`` / ``dense``). An unknown keyword is an error naming it.
        """
        unknown = [k for k in keywords if k not in POLICY_KEYWORDS]
        if unknown:
            raise FactorizeError(f"unknown policy keyword{'s' if len(unknown) > 1 else ''}: {', '.join(unknown)}",
                                 fix=f"use {', '.join(POLICY_KEYWORDS)}")
        kw = {k: v for k, v in keywords.items() if not (v is None and k in ("overrides", "multiple", "cost",
                                                                             "precisions", "method", "seed"))}
        if "overrides" in kw:
            kw["overrides"] = _as_overrides(kw["overrides"])
        return cls(**kw)

    def with_budget(self, budget: float) -> Policy:
        """The same policy with the rank rule replaced by ``budget=`` (the drift search walks budgets)."""
        return dataclasses.replace(self, rank=None, energy=None, keep=None, budget=budget)

    @property
    def filtered(self) -> bool:
        """True when include or exclude patterns narrow the layers considered."""
        return bool(self.include or self.exclude)


def resolve_policy(policy: Policy | None, keywords: Mapping[str, Any], *, budget: float | None = None) -> Policy:
    """The Policy of a call: ``policy`` as given, or one built from the policy ``keywords`` -- never both.

    ``budget``: the rank rule to use when the keywords set none (the drift search, which chooses the budget).
    """
    if policy is not None:
        if keywords:
            raise FactorizeError("a Policy and policy keywords were both given", [f"{k}=" for k in keywords],
                                 fix="put them into the Policy (dataclasses.replace(policy, ...)) or pass keywords "
                                     "only")
        if not isinstance(policy, Policy):
            raise FactorizeError(f"policy must be a factorize.Policy, got {type(policy).__name__}",
                                 fix="build one with Policy.from_keywords(budget=0.5, ...) or pass keywords")
        return policy
    if budget is not None:
        given = [k for k in POLICY_KEYS if keywords.get(k) is not None]
        if given:
            raise FactorizeError("max_drift= chooses the budget itself; it cannot be combined with a rank policy",
                                 [f"{k}=" for k in given], fix="drop budget=/rank=/energy=/keep=, or drop max_drift=")
        return Policy.from_keywords(**{**keywords, "budget": budget})
    return Policy.from_keywords(**keywords)


def _as_overrides(value: Iterable[Override | Mapping] | None) -> tuple[Override, ...]:
    out, problems = [], []
    for o in value or ():
        if isinstance(o, Override):
            out.append(o)
        elif isinstance(o, Mapping):
            bad = [k for k in o if k not in OVERRIDE_KEYS]
            if bad or "pattern" not in o:
                problems.append(f"{dict(o)!r}: " + (f"unknown keys {', '.join(map(str, bad))}" if bad
                                                    else "no pattern"))
                continue
            out.append(Override(**o))
        else:
            problems.append(f"{o!r} is neither an Override nor a mapping")
    if problems:
        raise FactorizeError("invalid overrides", problems,
                             fix=f"give Override objects or mappings with keys {', '.join(OVERRIDE_KEYS)}")
    return tuple(out)


def _validate_policy(p: Policy) -> None:
    given = [k for k in POLICY_KEYS if getattr(p, k) is not None]
    if len(given) != 1:
        raise FactorizeError(
            f"exactly one rank policy is needed, got {len(given)}" + (f" ({', '.join(given)})" if given else ""),
            fix="pass one of rank=N, energy=t, keep=f or budget=f",
        )
    if p.method not in METHODS + AWARE_METHODS:
        raise FactorizeError(f"unknown method {p.method!r}", fix=f"use one of {', '.join(METHODS + AWARE_METHODS)}")
    problems = _check_values("", rank=p.rank, energy=p.energy, keep=p.keep, budget=p.budget)
    if not isinstance(p.multiple, int) or p.multiple < 1:
        problems.append(f"multiple must be a positive integer, got {p.multiple!r}")
    if p.cost not in COSTS:
        problems.append(f"cost must be one of {', '.join(map(repr, COSTS))}, got {p.cost!r}")
    if p.precisions is not None:
        bad = [repr(x) for x in p.precisions if x not in PRECISIONS]
        if bad or not p.precisions:
            problems.append(f"precisions must be some of {', '.join(PRECISIONS)}, got {', '.join(bad) or 'none'}")
        elif p.cost != "bytes":
            problems.append("precisions= chooses stored precisions, which only a budget in bytes weighs (cost='bytes')")
    if p.cost in ("bytes", "latency") and p.budget is None:
        problems.append(f"cost={p.cost!r} counts what budget= keeps; rank=/energy=/keep= choose ranks alone")
    if isinstance(p.seed, bool) or not isinstance(p.seed, (int, np.integer)):
        problems.append(f"seed must be an integer, got {p.seed!r}")
    elif not 0 <= int(p.seed) < 2**63:  # torch.Generator.manual_seed takes 64-bit seeds; numpy's none below 0
        problems.append(f"seed must be in 0 .. 2**63 - 1, got {p.seed}")
    for name in ("include", "exclude"):
        bad = [repr(v) for v in getattr(p, name) or () if not isinstance(v, str)]
        if bad:
            problems.append(f"{name} patterns must be strings, got {', '.join(bad)}")
    for o in p.overrides:
        if not isinstance(o, Override):
            problems.append(f"override {o!r} is not an Override (Policy.from_keywords accepts mappings)")
            continue
        set_ = [k for k in ("rank", "energy", "keep") if getattr(o, k) is not None] + (["dense"] if o.dense else [])
        if len(set_) != 1:
            problems.append(f"override {o.pattern!r} must set exactly one of rank, energy, keep, dense")
        problems += _check_values(f"override {o.pattern!r}: ", rank=o.rank, energy=o.energy, keep=o.keep)
    if problems:
        raise FactorizeError("invalid rank policy", problems, fix="ranks are integers >= 1; fractions lie in (0, 1]; "
                             "precisions are names from factorize.rounding.PRECISIONS")


def _check_values(prefix: str, **values) -> list[str]:
    problems = []
    rank = values.pop("rank")
    if rank is not None and (isinstance(rank, bool) or not isinstance(rank, (int, np.integer)) or rank < 1):
        problems.append(f"{prefix}rank must be an integer >= 1, got {rank!r}")
    for key, v in values.items():
        if v is None:
            continue
        if isinstance(v, bool) or not isinstance(v, (int, float, np.floating)) or not (0 < float(v) <= 1):
            problems.append(f"{prefix}{key} must be a fraction in (0, 1], got {v!r}")
    return problems


def rank_needed(site: Site, policy: Policy) -> int:
    """How many leading singular triplets a policy can use for ``site`` (for partial decompositions)."""
    if not policy.overrides:  # a per-pattern rule may ask for more than the policy: then the bound below
        if policy.rank is not None:
            return min(-(-policy.rank // policy.multiple) * policy.multiple, site.max_rank)  # rounded up
        if policy.keep is not None:
            return max(1, min(site.max_rank, int(policy.keep * site.params / sum(site.shape))))
    # energy / budget / overrides: anything past break-even keeps the layer dense, so no more is needed
    return max(1, min(site.max_rank, site.break_even + policy.multiple))


def values_first(policy: Policy) -> bool:
    """Whether the values-first route is taken (by ``compress`` and by the weights-only shrink alike): a global
    budget (each layer's rank depends on every layer's whole spectrum) with ``method="auto"``. The singular values
    of every layer are found without vectors (:func:`factorize.spectra.decompose.values_only`), the budget is
    allocated from them, and only the kept vectors are computed (:func:`factorize.spectra.decompose.leading`,
    within 1% of the optimal error). Per-layer rules (rank, keep, energy) and the explicit methods keep their
    one-pass decomposition."""
    return policy.budget is not None and policy.method == "auto"


def check_precisions(precisions: Sequence[str] | None) -> tuple[str, ...]:
    """The allowed precisions, validated (every bad name listed once); None gives :data:`DEFAULT_PRECISIONS`."""
    if precisions is None:
        return DEFAULT_PRECISIONS
    if isinstance(precisions, str):
        precisions = tuple(p.strip() for p in precisions.split(","))
    bad = [p for p in precisions if p not in PRECISIONS]
    if bad or not precisions:
        raise FactorizeError(f"unknown stored precision(s): {', '.join(map(repr, bad)) or 'none given'}",
                             fix=f"use some of {', '.join(PRECISIONS)}")
    return tuple(dict.fromkeys(check_precision(p) for p in precisions))
