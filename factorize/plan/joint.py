"""Choose one stored form per layer under one budget: the joint planner's selection core.

Every layer offers candidates (dense at a precision, factored at a rank with both factors at a precision, or
rounded dense plus a rank-r correction), each with a ``cost`` (bytes, multiply-adds or measured seconds: whatever
the budget counts) and a predicted ``error`` already scaled by the layer's sensitivity, so errors add across
layers. Picking exactly one candidate per layer with total cost <= budget and the least total error is the
multiple-choice knapsack problem (MCKP; NP-hard in general, common knowledge). This module takes numbers, not
tensors: building and pricing the candidates lives elsewhere.

How a budget is solved (:func:`solve`):

1. **Prune.** Per layer, a candidate that costs at least as much as another and errs at least as much is dropped
   (:func:`dominated`); it can never be needed. The rest, sorted by cost, have strictly falling error.
2. **Lagrangian path.** Per layer, the lower convex hull of the (cost, error) points; its edges, sorted by error
   removed per unit cost, are taken from every layer's cheapest candidate while they fit. For a multiplier
   lambda equal to the slope of the first edge that no longer fits, each layer's choice minimises
   ``error + lambda * cost`` on its own, so by Everett's theorem (Everett 1963, "Generalized Lagrange multiplier
   method for solving problems of optimum allocation of resources", Operations Research 11; cited from memory)
   that selection is *exactly optimal for the budget it spends*. Taking that edge fractionally gives the linear
   relaxation, whose value is a lower bound on the optimum at the full budget (the MCKP greedy; Sinha & Zoltners
   1979, "The multiple-choice knapsack problem", Operations Research 27; from memory). The gap at this point is
   at most the error that one edge of one layer removes.
3. **Fill and repair.** The remaining budget is filled along the hull edges that still fit (a layer whose next
   edge does not fit stops there), then single-layer swaps to any undominated candidate that fits the leftover
   budget are made, the largest error reduction first, until none helps.
4. **Exact pass.** Unless step 2 already proved optimality, a dynamic programme over the layers (in name order)
   keeps only Pareto-optimal partial selections (cost, error) and discards every partial selection whose error
   plus the linear-relaxation bound of the layers still to come exceeds the step-3 selection: bounds-pruned
   dynamic programming, the idea of Pisinger's minimal MCKP algorithm (Pisinger 1995, "A minimal algorithm for
   the multiple-choice knapsack problem", EJOR 83; from memory), without its core expansion. It is exact (up to
   a relative tolerance of 1e-9 on errors, for float rounding) whenever it finishes within ``max_work``
   examined combinations; otherwise the step-3 selection is returned with ``exact=False`` and its certified gap
   ``error - lower_bound``.

Budget arithmetic: a selection is within budget when ``math.fsum`` of its costs (the correctly rounded sum,
independent of order) is <= ``budget_cost``; every returned selection is checked that way.

Latency budgets: ``never_above`` maps a layer name to the highest cost any of its candidates may have (for example
the dense layer's own measured time, so a form measured slower than the dense layer is never picked); candidates
above it are removed before solving. Callers may instead filter their candidate lists themselves; both give the
same result.

Determinism: layers are processed in sorted name order and candidates in their given order (of duplicates, the
first is kept). On the Lagrangian path, edges of equal slope go to the earlier layer name first; in the exact pass,
selections of equal error go to the lower total cost, then to a fixed order derived from the sorted names and
candidate positions. The same input, in any dict order, gives the same selection.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from fractions import Fraction

import numpy as np

from factorize.errors import FactorizeError
from factorize.plan.entries import CORRECTED, DENSE, FACTOR

FORMS = (DENSE, FACTOR, CORRECTED)  # the plan forms a candidate can take (factorize.plan.entries)
DEFAULT_MAX_WORK = 50_000_000  # combinations the exact pass may examine in all (about 1-2 s of numpy work)
_STEP_WORK = 2_000_000  # and per layer (bounds its memory: a few arrays of this many float64)
_REL_TOL = 1e-9  # relative tolerance on errors for the exact pass's pruning (float rounding only)


@dataclass(frozen=True)
class Candidate:
    """One way to store one layer, priced and with its predicted error."""

    form: str  # "dense" | "factor" | "corrected" (rounded dense plus a rank-r correction)
    precision: str  # stored precision of the dense weight or of both factors, e.g. "int8", "int4g64"
    rank: int | None  # None for dense; the factor rank, or the correction's rank
    cost: float  # what the budget counts: bytes, multiply-adds or measured seconds (>= 0)
    error: float  # predicted output-weighted error, scaled by the layer's sensitivity, so errors add (>= 0)
    reason: str = ""  # why this candidate exists or was adjusted (goes into the plan)

    def __post_init__(self) -> None:
        problems = []
        if self.form not in FORMS:
            problems.append(f"form={self.form!r}: expected one of {', '.join(FORMS)}")
        if not isinstance(self.precision, str) or not self.precision:
            problems.append(f"precision={self.precision!r}: expected a precision name such as 'int8'")
        if self.form == DENSE and self.rank is not None:
            problems.append(f"rank={self.rank!r}: a dense candidate has no rank (use None)")
        if self.form in (FACTOR, CORRECTED) and not (
                isinstance(self.rank, int) and not isinstance(self.rank, bool) and self.rank >= 1):
            problems.append(f"rank={self.rank!r}: a {self.form} candidate needs an integer rank >= 1")
        for field in ("cost", "error"):
            value = getattr(self, field)
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value) \
                    or value < 0:
                problems.append(f"{field}={value!r}: expected a finite number >= 0")
        if problems:
            raise FactorizeError("bad joint-plan candidate", problems,
                                 fix="build candidates with a known form, a rank only for factored forms, "
                                     "and finite non-negative cost and error")


@dataclass(frozen=True)
class Selection:
    """One candidate per layer, with what it costs, its predicted error and how close to optimal it is proved."""

    chosen: dict[str, Candidate]  # layer name -> candidate, in sorted name order
    cost: float  # math.fsum of the chosen costs (<= the budget)
    error: float  # sum of the chosen errors
    lower_bound: float  # no selection within the budget has a smaller total error (up to float rounding)
    exact: bool  # True when the selection is proved optimal (lower_bound == error within 1e-9 relative)


# ----------------------------------------------------------------------------------------------- public helpers


def dominated(cands: Sequence[Candidate]) -> list[Candidate]:
    """The candidates some other candidate of the same layer beats or matches on both cost and error.

    Of exact duplicates (same cost and error) the first one is kept. Such a candidate is never needed: swapping
    it for the one that dominates it keeps any selection within budget and does not raise its error.
    """
    keep = set(_pareto_order(cands))
    return [c for i, c in enumerate(cands) if i not in keep]


def undominated(cands: Sequence[Candidate]) -> list[Candidate]:
    """The candidates that :func:`dominated` keeps, in their given order."""
    keep = set(_pareto_order(cands))
    return [c for i, c in enumerate(cands) if i in keep]


def choose_candidates(candidates: Mapping[str, Sequence[Candidate]], budget_cost: float, *,
                      never_above: Mapping[str, float] | None = None,
                      max_work: int = DEFAULT_MAX_WORK) -> dict[str, Candidate]:
    """Exactly one candidate per layer, total cost <= ``budget_cost``, least total predicted error.

    See :func:`solve` (which also returns the cost, error and the proved lower bound).
    """
    return solve(candidates, budget_cost, never_above=never_above, max_work=max_work).chosen


def solve(candidates: Mapping[str, Sequence[Candidate]], budget_cost: float, *,
          never_above: Mapping[str, float] | None = None, max_work: int = DEFAULT_MAX_WORK) -> Selection:
    """Solve one budget; the algorithm and its guarantee are in the module docstring.

    Raises FactorizeError for bad candidates, a bad ``never_above``, or a budget below the smallest reachable
    cost (every layer at its cheapest candidate).
    """
    problem = _Problem(_validate(candidates, never_above))
    _check_budgets(problem, [budget_cost])
    return problem.solve(float(budget_cost), _check_work(max_work))


def frontier(candidates: Mapping[str, Sequence[Candidate]], costs: Sequence[float], *,
             never_above: Mapping[str, float] | None = None,
             max_work: int = DEFAULT_MAX_WORK) -> list[dict[str, Candidate]]:
    """One selection per budget in ``costs`` (for sweeps); pruning and hulls are computed once.

    Every budget is checked before any is solved: one below the smallest reachable cost raises FactorizeError.
    """
    problem = _Problem(_validate(candidates, never_above))
    _check_budgets(problem, list(costs))
    work = _check_work(max_work)
    return [problem.solve(float(b), work).chosen for b in costs]


# ------------------------------------------------------------------------------------------------ validation


def _check_work(max_work: int) -> int:
    if isinstance(max_work, bool) or not isinstance(max_work, int) or max_work < 0:
        raise FactorizeError(f"max_work={max_work!r}: expected an integer >= 0",
                             fix="pass the number of combinations the exact pass may examine (0 turns it off)")
    return max_work


def _validate(candidates: Mapping[str, Sequence[Candidate]],
              never_above: Mapping[str, float] | None) -> list[tuple[str, list[Candidate]]]:
    """Check everything at once; return (name, candidates within never_above) in sorted name order."""
    if not isinstance(candidates, Mapping) or not candidates:
        raise FactorizeError("joint planning needs a non-empty mapping of layer name -> candidates",
                             fix="pass {layer name: [Candidate, ...]} with at least one layer")
    problems = []
    for name in sorted(candidates, key=str):
        cands = candidates[name]
        if not isinstance(name, str):
            problems.append(f"{name!r}: layer names must be strings")
        elif isinstance(cands, (str, bytes)) or not isinstance(cands, Sequence) or not cands:
            problems.append(f"{name}: expected a non-empty sequence of Candidate, got {cands!r}")
        elif not all(isinstance(c, Candidate) for c in cands):
            problems.append(f"{name}: every entry must be a Candidate")
    limits = {} if never_above is None else never_above
    for name in sorted(limits, key=str):
        value = limits[name]
        if name not in candidates:
            problems.append(f"never_above[{name!r}]: no such layer among the candidates")
        elif isinstance(value, bool) or not isinstance(value, (int, float)) or math.isnan(value):
            problems.append(f"never_above[{name!r}]={value!r}: expected a number")
    if problems:
        raise FactorizeError("bad input to the joint planner", problems,
                             fix="give every layer a non-empty list of Candidate, and never_above limits only "
                                 "for layers that have candidates")
    out, empty = [], []
    for name in sorted(candidates):
        limit = limits.get(name, math.inf)
        kept = [c for c in candidates[name] if c.cost <= limit]
        if not kept:
            cheapest = min(c.cost for c in candidates[name])
            empty.append(f"{name}: never_above={limit:g}, cheapest candidate costs {cheapest:g}")
        out.append((name, kept))
    if empty:
        raise FactorizeError("no candidate of these layers is within its never_above limit", empty,
                             fix="raise the limit, or offer a candidate at or below it (under a latency budget, "
                                 "the dense layer at its own measured time always qualifies)")
    return out


def _check_budgets(problem: _Problem, budgets: list[float]) -> None:
    bad = [f"budget {b!r}: expected a number" for b in budgets
           if isinstance(b, bool) or not isinstance(b, (int, float)) or math.isnan(b)]
    if bad:
        raise FactorizeError("bad budget for the joint planner", bad, fix="pass the budget as a number")
    low = [b for b in budgets if b < problem.min_cost]
    if low:
        heavy = sorted(problem.layers, key=lambda lay: (-lay.costs[0], lay.name))[:3]
        raise FactorizeError(
            f"budget {min(low):g} is below the smallest reachable cost {problem.min_cost:g} (every layer at its "
            f"cheapest candidate)",
            [f"{lay.name}: cheapest candidate costs {lay.costs[0]:g}" for lay in heavy],
            fix=f"raise the budget to at least {problem.min_cost:g}, or offer cheaper candidates (a lower precision "
                f"or a smaller rank) for the layers above, which cost most at their cheapest")


# ------------------------------------------------------------------------------------------------ the solver


def _pareto_order(cands: Sequence[Candidate]) -> list[int]:
    """Indices of the undominated candidates, sorted by cost (errors then strictly fall)."""
    order = sorted(range(len(cands)), key=lambda i: (cands[i].cost, cands[i].error, i))
    kept, best = [], math.inf
    for i in order:
        if cands[i].error < best:
            kept.append(i)
            best = cands[i].error
    return kept


class _Layer:
    """One layer's undominated candidates (cost ascending) and its lower convex hull."""

    def __init__(self, name: str, cands: list[Candidate]) -> None:
        self.name = name
        self.index = _pareto_order(cands)  # position in the Pareto list -> position in the caller's list
        self.cands = [cands[i] for i in self.index]
        self.costs = np.array([c.cost for c in self.cands], dtype=np.float64)
        self.errors = np.array([c.error for c in self.cands], dtype=np.float64)
        self.hull = self._hull()  # positions in the Pareto list on the lower convex hull, cost ascending

    def _hull(self) -> list[int]:
        # Andrew's monotone chain, lower part (common practice); collinear points are kept (finer steps)
        hull: list[int] = []
        for p in range(len(self.cands)):
            while len(hull) >= 2:
                a, b = hull[-2], hull[-1]
                cross = ((self.costs[b] - self.costs[a]) * (self.errors[p] - self.errors[a])
                         - (self.errors[b] - self.errors[a]) * (self.costs[p] - self.costs[a]))
                if cross < 0:  # b lies above the segment a -> p: not on the lower hull
                    hull.pop()
                else:
                    break
            hull.append(p)
        return hull


class _Problem:
    """Prepared once per candidate set: pruned layers, hulls, and the hull edges in Lagrangian order."""

    def __init__(self, layers: list[tuple[str, list[Candidate]]]) -> None:
        self.layers = [_Layer(name, cands) for name, cands in layers]
        self.min_cost = math.fsum(lay.costs[0] for lay in self.layers)
        self.max_cost = math.fsum(lay.costs[-1] for lay in self.layers)
        self.base_error = math.fsum(lay.errors[0] for lay in self.layers)
        rows = []  # (sort slope, layer, step k, cost increase, error decrease)
        for li, lay in enumerate(self.layers):
            slope_cap = math.inf
            for k in range(len(lay.hull) - 1):
                a, b = lay.hull[k], lay.hull[k + 1]
                dcost, gain = lay.costs[b] - lay.costs[a], lay.errors[a] - lay.errors[b]
                slope_cap = min(slope_cap, gain / dcost)  # monotone even under float noise: per-layer order kept
                rows.append((slope_cap, li, k, dcost, gain))
        rows.sort(key=lambda r: (-r[0], r[1], r[2]))
        self.edges = rows
        self.edge_layer = np.array([r[1] for r in rows], dtype=np.int64)
        self.edge_cost = np.array([r[3] for r in rows], dtype=np.float64)
        self.edge_gain = np.array([r[4] for r in rows], dtype=np.float64)

    def solve(self, budget: float, max_work: int) -> Selection:
        budget = min(budget, self.max_cost)  # no selection costs more (fsum is monotone); keeps Fraction finite
        pos, bound = self._lagrangian(budget)
        pos = self._repair(pos, budget)
        error = self.error_of(pos)
        tol = _REL_TOL * max(self.base_error, 1e-300)
        exact = error - bound <= tol
        if not exact and max_work > 0:
            found = _exact(self, budget, error, max_work)
            if found is not None:
                better = self.error_of(found)
                if better <= error:
                    pos, error = found, better
                exact, bound = True, error  # proved by the exact pass (within its pruning tolerance)
        chosen = {lay.name: lay.cands[p] for lay, p in zip(self.layers, pos)}
        return Selection(chosen=chosen, cost=self.cost_of(pos), error=float(error),
                         lower_bound=float(min(bound, error)), exact=bool(exact))

    def cost_of(self, pos: Sequence[int]) -> float:
        return math.fsum(lay.costs[p] for lay, p in zip(self.layers, pos))

    def error_of(self, pos: Sequence[int]) -> float:
        return math.fsum(lay.errors[p] for lay, p in zip(self.layers, pos))

    def _lagrangian(self, budget: float) -> tuple[list[int], float]:
        """Steps 2 and 3a: the hull edges in slope order while they fit, then the fill; returns the Lagrangian
        (linear-relaxation) lower bound at the full budget."""
        steps = [0] * len(self.layers)  # hull edges taken per layer
        blocked = [False] * len(self.layers)
        left = Fraction(budget) - sum((Fraction(lay.costs[0]) for lay in self.layers), Fraction(0))
        bound, gained = None, 0.0
        for _, li, k, dcost, gain in self.edges:
            if blocked[li] or steps[li] != k:
                continue
            lay = self.layers[li]
            step = Fraction(lay.costs[lay.hull[k + 1]]) - Fraction(lay.costs[lay.hull[k]])
            if step <= left:
                left -= step
                steps[li] += 1
                if bound is None:
                    gained += gain
            else:
                blocked[li] = True
                if bound is None:  # the split edge: the relaxation takes it fractionally
                    bound = self.base_error - gained - gain * float(left) / dcost
        if bound is None:  # every edge fitted: each layer at its least error, optimal
            bound = self.base_error - gained
        return [lay.hull[s] for lay, s in zip(self.layers, steps)], bound

    def _repair(self, pos: list[int], budget: float) -> list[int]:
        """Step 3b: the single-layer swap that removes the most error and fits, repeatedly."""
        pos = list(pos)
        left = Fraction(budget) - sum((Fraction(lay.costs[p]) for lay, p in zip(self.layers, pos)), Fraction(0))
        for _ in range(sum(len(lay.cands) for lay in self.layers)):
            best = None  # (error decrease, layer, new position, exact cost increase)
            for li, lay in enumerate(self.layers):
                here = Fraction(lay.costs[pos[li]])
                # undominated candidates cost more exactly when they err less: the furthest that fits is best
                j = int(np.searchsorted(lay.costs, lay.costs[pos[li]] + float(left), side="right")) - 1
                while j > pos[li] and Fraction(lay.costs[j]) - here > left:
                    j -= 1
                if j > pos[li]:
                    drop = lay.errors[pos[li]] - lay.errors[j]
                    if best is None or drop > best[0]:
                        best = (drop, li, j, Fraction(lay.costs[j]) - here)
            if best is None:
                break
            _, li, j, step = best
            pos[li], left = j, left - step
        return pos


def _suffix_relaxation(problem: _Problem, start: int) -> tuple[float, float, np.ndarray, np.ndarray]:
    """Layers ``start``.. : cheapest total cost, its error, and the cumulative (cost, gain) of their hull edges
    in slope order, so that ``error - interp(extra budget)`` is their linear-relaxation bound."""
    layers = problem.layers[start:]
    mask = problem.edge_layer >= start
    cum_cost = np.concatenate([[0.0], np.cumsum(problem.edge_cost[mask])])
    cum_gain = np.concatenate([[0.0], np.cumsum(problem.edge_gain[mask])])
    return (float(sum(lay.costs[0] for lay in layers)), float(sum(lay.errors[0] for lay in layers)),
            cum_cost, cum_gain)


def _exact(problem: _Problem, budget: float, incumbent: float, max_work: int) -> list[int] | None:
    """Step 4: bounds-pruned dynamic programming over Pareto-optimal partial selections; None if over max_work."""
    tol = _REL_TOL * max(problem.base_error, 1e-300)
    slack = 1e-12 * max(abs(budget), 1e-300)  # float sums may differ from fsum by rounding: keep, check at the end
    cost, err = np.zeros(1), np.zeros(1)
    parents: list[tuple[np.ndarray, np.ndarray]] = []  # per layer: (state it extends, candidate position)
    work = 0
    for li, lay in enumerate(problem.layers):
        work += cost.size * lay.costs.size
        if work > max_work or cost.size * lay.costs.size > _STEP_WORK:
            return None
        rest_cost, rest_err, cum_cost, cum_gain = _suffix_relaxation(problem, li + 1)
        c = (cost[:, None] + lay.costs[None, :]).ravel()  # (states * candidates,)
        e = (err[:, None] + lay.errors[None, :]).ravel()
        extra = budget - c - rest_cost
        keep = extra >= -slack
        keep &= e + rest_err - np.interp(np.maximum(extra, 0.0), cum_cost, cum_gain) <= incumbent + tol
        idx = np.flatnonzero(keep)  # generation order: state, then candidate (deterministic)
        order = idx[np.lexsort((idx, e[idx], c[idx]))]
        run_min = np.minimum.accumulate(e[order])
        front = np.concatenate([[True], e[order][1:] < run_min[:-1]]) if order.size else np.zeros(0, bool)
        order = order[front]  # Pareto: cost ascending, error strictly falling
        if order.size == 0:
            return None
        parents.append((order // lay.costs.size, order % lay.costs.size))
        cost, err = c[order], e[order]
    for final in np.lexsort((np.arange(err.size), cost, err)):  # least error, then cost, then generation
        pos = _trace(parents, int(final))
        if problem.cost_of(pos) <= budget:
            return pos
    return None


def _trace(parents: list[tuple[np.ndarray, np.ndarray]], state: int) -> list[int]:
    pos = []
    for back, cand in reversed(parents):
        pos.append(int(cand[state]))
        state = int(back[state])
    return pos[::-1]
