"""Safe defaults on transformers models: under a budget, the input embedding table stays dense.

Why: a vocabulary table is a lookup (no multiply-adds when dense), often the largest matrix of an encoder, and
its singular values fall slowly; a global budget then spends itself there, and a factored table adds ``r * m``
multiply-adds per token (measured on the MiniLM sentence encoder: rank 100, weight error 0.74). So a budget on a
model that answers transformers' ``get_input_embeddings()`` leaves that table, and any head tied to its weight,
out of the selection: they are not counted in what the budget divides, and the plan carries a dense row for each
with :data:`HELD_REASON`. A user who wants them factored names them: an ``include`` pattern or an override
pattern that matches the name (``include="*"`` counts) brings them back as ordinary sites.

Per-layer rules (``rank`` / ``energy`` / ``keep``) say what to do with each selected layer and are left as they
are; so is a model without ``get_input_embeddings``.
"""

from __future__ import annotations

import fnmatch
import glob
from collections.abc import Mapping

import torch
from torch import nn

from factorize.model.sites import Site, input_embedding_names, walk
from factorize.plan.policy import Policy

HELD_REASON = ("input embedding table of a transformers model (or a head tied to it): left dense and outside the "
               "budget by default; name it in an include or override pattern to factor it")


def held_by_default(model: nn.Module, policy: Policy) -> list[str]:
    """The layers a budget leaves dense by default on ``model`` (see the module docstring), in module order."""
    if policy.budget is None or policy.include:  # with include patterns, those that match it name it
        return []
    named = [*(policy.exclude or ()), *(o.pattern for o in policy.overrides)]  # excluded: out anyway, no row
    return [n for n in input_embedding_names(model) if not any(fnmatch.fnmatchcase(n, p) for p in named)]


def excluding(policy: Policy, held: list[str]) -> tuple[str, ...] | None:
    """The policy's exclude patterns plus one exact (glob-escaped) pattern per held layer."""
    if not held:
        return policy.exclude
    return (*(policy.exclude or ()), *(glob.escape(n) for n in held))


def with_held_rows(plan: dict, model: nn.Module, held: list[str]) -> dict:
    """``plan`` with a dense row (reason :data:`HELD_REASON`) for each held layer, every row in module order. Rows
    carry the stored bytes when the plan's rows do (budgets in bytes or time), so its totals stay whole."""
    if not held:
        return plan
    from factorize.plan.ranks import site_entry

    sites = {s.name: s for s in walk(model, include=[glob.escape(n) for n in held]).sites}
    stored = bool(plan["sites"]) and all("bytes_after" in e for e in plan["sites"].values())
    rows = dict(plan["sites"])
    for name in held:
        if name in sites and name not in rows:
            rows[name] = _stored_row(sites[name]) if stored else site_entry(sites[name], None, None, HELD_REASON)
    order = {name: i for i, (name, _) in enumerate(model.named_modules())}
    plan["sites"] = {n: rows[n] for n in sorted(rows, key=lambda n: order.get(n, len(order)))}
    return plan


def _stored_row(site: Site) -> dict:
    from factorize.plan.forms import Candidate, entry_for, native_precision
    from factorize.rounding import stored_bytes

    native = native_precision(getattr(torch, site.dtype))
    kept = Candidate("dense", native, None, float(stored_bytes(native, tuple(site.shape))), 0.0)
    return entry_for(site, kept, HELD_REASON, None, native)


def held_note(plan: Mapping) -> str | None:
    """One line for a report naming the layers a budget left dense by default, or None."""
    held = [n for n, e in (plan.get("sites") or {}).items()
            if isinstance(e, Mapping) and e.get("reason") == HELD_REASON]
    if not held:
        return None
    what = "the input embedding table of a transformers model" + (" and the heads tied to it" if len(held) > 1 else "")
    return (f"left dense by default: {', '.join(held)} ({what}); the budget covers the other layers; to factor it, "
            "name it with --include (include=) or an override")
