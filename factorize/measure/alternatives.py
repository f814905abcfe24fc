"""The plain alternatives beside a plan, and the one sentence that says which is best.

At the chosen size a report also shows the same model made the plain ways, measured on the same sample inputs:

* ``"int8"``: every layer the plan selected rounded to int8 (one scale per output row) and not factored, the
  first thing a practitioner tries (common practice);
* ``"rank"``: rank alone, the factors in the weights' own precision (float32), at the plan's stored bytes;
* ``"joint"``: rank and stored precision chosen together (``cost="bytes"``) at the plan's stored bytes.

One of the last two is the plan itself. :func:`verdict` compares them: the best is the one with the least drift
among those no larger than the plan (a smaller model with less drift beats the plan outright; a larger one is only
shown). Drift is the relative L2 error of the outputs (:func:`factorize.measure.drift.output_drift`), measured on
the sample inputs only, so the comparison holds for those inputs and is no guarantee elsewhere.

The alternatives are built by :func:`factorize.alternatives.compare_alternatives`, which has the model; this
module only holds and words the numbers.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

NAMES = {"int8": "int8 rounding alone", "rank": "rank alone", "joint": "rank and precision"}
METRIC = "relative_l2"  # the drift the sentence compares (what --max-drift and --target-drift limit)
SLACK = 1.01  # an alternative within 1% of the plan's bytes counts as the same size


@dataclass
class Alternative:
    """One way of making the model, at a stored size, with its drift on the report's sample inputs."""

    name: str  # "int8", "rank" or "joint" (see NAMES)
    bytes_before: int  # stored bytes of the plan's layers in the original model
    bytes_after: int  # the same layers' stored bytes in this alternative
    drift: dict | None = None  # output_drift on the report's inputs (None: could not be built)
    this_plan: bool = False  # the plan the report is about
    note: str = ""  # how it was made, or why it could not be
    budget: float | None = None  # the budget its plan was made with, where one was
    details: dict = field(default_factory=dict)  # e.g. how many layers were factored

    @property
    def label(self) -> str:
        return NAMES.get(self.name, self.name)

    @property
    def fraction(self) -> float:
        """Stored bytes kept, as a fraction of the original's (of the plan's layers)."""
        return self.bytes_after / self.bytes_before if self.bytes_before else 1.0

    @property
    def value(self) -> float | None:
        d = self.drift or {}
        v = d.get(METRIC)
        return None if v is None else float(v)

    def to_json(self) -> dict:
        return {"name": self.name, "label": self.label, "this_plan": self.this_plan, "bytes_before": self.bytes_before,
                "bytes_after": self.bytes_after, "bytes_fraction": self.fraction, "budget": self.budget,
                "drift": dict(self.drift) if self.drift is not None else None, "note": self.note,
                **({"details": dict(self.details)} if self.details else {})}


def smaller(fraction: float) -> str:
    """``1/fraction`` as "4x" (how many times smaller than the original)."""
    return "-" if fraction <= 0 else f"{1 / fraction:.3g}x"


def _d(v: float) -> str:
    return f"{v:.3g}"


def _times(worse: float, better: float) -> str:
    if better <= 0:
        return "with no measurable drift against"
    return f"{worse / better:.3g} times less than"


def verdict(alternatives: Sequence[Alternative]) -> str | None:
    """One plain sentence: which of the alternatives is best, by how much, and what to try next (None when the
    plan or fewer than two measured alternatives are missing).

    Best: the least relative L2 drift among the alternatives no larger than the plan (within :data:`SLACK`); on a
    tie the plan wins, then the smaller one.
    """
    plan = next((a for a in alternatives if a.this_plan), None)
    measured = [a for a in alternatives if a.value is not None]
    if plan is None or plan.value is None or len(measured) < 2:
        return None
    fit = [a for a in measured if a.fraction <= plan.fraction * SLACK + 1e-12]
    best = min(fit, key=lambda a: (a.value, not a.this_plan, a.fraction))
    rounding = plan.details.get("cost") == "bytes" or plan.name == "joint"
    size = f"{smaller(plan.fraction)} smaller"
    same = next((a for a in measured if a.name == "int8" and a.bytes_after == plan.bytes_after
                 and a.value == plan.value), None)
    if best is plan and same is not None:
        return (f"This plan is int8 rounding alone (relative L2 drift {_d(plan.value)} at {size}), which beats rank "
                "alone here. Next: a lower budget lets the planner factor or round to 4 bits; a higher one keeps "
                "more layers wider.")
    if best is plan:
        others = "; ".join(f"{a.label} {_d(a.value)} at {smaller(a.fraction)}" for a in measured if a is not plan)
        larger = [a.label for a in measured if a.fraction > plan.fraction * SLACK]
        tail = f" ({', '.join(larger)} is larger than this plan)" if larger else ""
        return (f"This plan is the best of these: relative L2 drift {_d(plan.value)} at {size}, against {others}"
                f"{tail}. Next: a lower budget for a smaller model, a higher one for less drift.")
    if best.name == "int8":
        step = ("the predicted errors misjudged these layers: try calibration inputs (calibration=...; terminal: "
                "--calibration FILE), or int8 alone (precisions=('int8',); terminal: --precisions int8)") if rounding \
            else "try cost='bytes' (terminal: --cost bytes), which weighs rounding and rank together"
        return (f"{best.label} is {smaller(best.fraction)} smaller at drift {_d(best.value)} than this plan's "
                f"{smaller(plan.fraction)} at {_d(plan.value)}: {step}.")
    if best.name == "joint":
        int8 = next((a for a in measured if a.name == "int8" and a.fraction < best.fraction and a.value < plan.value),
                    None)
        also = "" if int8 is None else (f"; {int8.label} is smaller still ({smaller(int8.fraction)}) at drift "
                                        f"{_d(int8.value)}, also better than this plan")
        return (f"rank and precision together (cost='bytes') drifts {_d(best.value)} at {smaller(best.fraction)} "
                f"smaller, {_times(plan.value, best.value)} this plan's {_d(plan.value)} at {size}{also}: "
                "try cost='bytes' (terminal: --cost bytes).")
    return (f"{best.label} drifts {_d(best.value)} at {smaller(best.fraction)} smaller, "
            f"{_times(plan.value, best.value)} this plan's {_d(plan.value)} at {size}: rounding cost more than "
            "predicted; try calibration inputs (terminal: --calibration FILE), or leave out the 4-bit precisions "
            "(precisions=('float32', 'bfloat16', 'int8'); terminal: --precisions float32,bfloat16,int8).")


COLUMNS = ("alternative", "bytes (kept)", "smaller", "relative L2", "note")


def rows(alternatives: Sequence[Alternative]) -> list[tuple[str, ...]]:
    """One row of :data:`COLUMNS` per alternative, for the screen and Markdown tables."""
    out = []
    for a in alternatives:
        value = "-" if a.value is None else f"{a.value:.4g}"
        label = a.label + (" (this plan)" if a.this_plan else "")
        note = a.note or "-"
        out.append((label, f"{a.bytes_after:,} ({100 * a.fraction:.1f}%)", smaller(a.fraction), value, note))
    return out

