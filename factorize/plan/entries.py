"""A typed view of a plan's entries: read a plan through :func:`plan_entries` instead of comparing strings.

A plan stays plain JSON-serialisable data (saved plans and checkpoints are unchanged, docs/file-format.md); each
entry of ``plan["sites"]`` records what becomes of one layer in its ``"action"`` field, called its **form** here:

* ``"factor"``: the layer is replaced by rank-r factors (``"rank"`` holds r);
* ``"dense"``: the layer is kept as it is;
* ``"corrected"``: the layer's weight is stored rounded, plus a rank-k correction (``"correction_rank"``).

Any entry may carry ``"precision"``, the stored precision of its weight (dense), of its factors (factor) or of its
rounded part (corrected); an entry without one keeps the weight's own dtype (plan version 1).

:data:`FORMS` describes each form once (whether an entry of that form carries a rank, whether the layer is
rewritten in the model); a new form (a weight stored rounded, factors plus a rounding correction) is one more
:class:`Form` there, and every reader below follows it. :class:`PlanEntry` is a frozen record read from one entry,
with the stored ``precision`` plan version 2 records.
"""

from __future__ import annotations

from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from typing import Any

FACTOR = "factor"
DENSE = "dense"
CORRECTED = "corrected"


@dataclass(frozen=True)
class Form:
    """What a plan entry's form means for the readers of a plan."""

    name: str  # the value of the entry's "action" field
    has_rank: bool  # the entry carries a rank r and the layer holds rank-r factors
    rewrites: bool  # the layer is replaced in the model (apply_plan builds something for it)


FORMS: dict[str, Form] = {
    FACTOR: Form(FACTOR, has_rank=True, rewrites=True),
    DENSE: Form(DENSE, has_rank=False, rewrites=False),
    # rounded dense weight plus a low-rank correction ("correction_rank"); see factorize.rewrite.forms
    CORRECTED: Form(CORRECTED, has_rank=False, rewrites=True),
}


@dataclass(frozen=True)
class PlanEntry:
    """One site of a plan, read from its JSON entry (a view: the plan itself is not changed).

    Fields a hand-written or older entry lacks are None. ``form`` is the entry's ``"action"``.
    """

    name: str
    form: str | None
    kind: str | None = None
    shape: tuple[int, ...] | None = None
    rank: int | None = None
    reason: str = ""
    params: int | None = None
    params_after: int | None = None
    predicted_error: float | None = None
    precision: str | None = None  # stored precision of the layer's weights (plan version 2; None: as it is)
    correction_rank: int | None = None  # the corrected form's rank

    @property
    def factored(self) -> bool:
        """The layer holds rank-r factors (``rank`` is its r)."""
        form = FORMS.get(self.form) if isinstance(self.form, str) else None
        return form is not None and form.has_rank

    @property
    def rewritten(self) -> bool:
        """The layer is replaced in the model (not kept as it is)."""
        form = FORMS.get(self.form) if isinstance(self.form, str) else None
        return form is not None and form.rewrites


def entry_form(entry: Any) -> str | None:
    """The form (``"action"``) of a raw JSON entry, or None where it is not a mapping or has none."""
    return entry.get("action") if isinstance(entry, Mapping) else None


def is_factored_entry(entry: Any) -> bool:
    """Whether a raw JSON entry factors its layer (for code that updates entries in place)."""
    form = entry_form(entry)
    return isinstance(form, str) and form in FORMS and FORMS[form].has_rank


def plan_entry(name: str, entry: Mapping) -> PlanEntry:
    """The record of one raw entry (tolerant: missing or odd fields read as None)."""
    shape = entry.get("shape")
    return PlanEntry(
        name=name, form=entry.get("action"), kind=entry.get("kind"),
        shape=tuple(shape) if isinstance(shape, (list, tuple)) else None, rank=entry.get("rank"),
        reason=str(entry.get("reason", "")), params=entry.get("params"), params_after=entry.get("params_after"),
        predicted_error=entry.get("predicted_error"), precision=entry.get("precision"),
        correction_rank=entry.get("correction_rank"),
    )


def plan_entries(plan: Mapping) -> Iterator[PlanEntry]:
    """Every site of ``plan`` in its order, as a :class:`PlanEntry` (entries that are not mappings are skipped:
    :func:`factorize.rewrite.apply.check_plan` reports them)."""
    for name, entry in (plan.get("sites") or {}).items():
        if isinstance(entry, Mapping):
            yield plan_entry(name, entry)


def factored_entries(plan: Mapping) -> Iterator[PlanEntry]:
    """The entries of ``plan`` whose layer holds rank-r factors."""
    return (e for e in plan_entries(plan) if e.factored)


def factored_names(plan: Mapping) -> list[str]:
    """Names of the sites ``plan`` factors, in plan order."""
    return [e.name for e in factored_entries(plan)]


def factored_ranks(plan: Mapping) -> dict[str, int]:
    """name -> rank for the sites ``plan`` factors."""
    return {e.name: e.rank for e in factored_entries(plan)}


def rewritten_names(plan: Mapping) -> list[str]:
    """Names of the sites whose layer ``plan`` replaces in the model, in plan order."""
    return [e.name for e in plan_entries(plan) if e.rewritten]
