"""Site-level decomposition: values first, then the kept vectors, checked against numpy.linalg.svd."""

from __future__ import annotations

import numpy as np
import torch

from factorize import compress, walk
from factorize.model.sites import get_module, matrix_of
from factorize.pipeline import sweep_spectra
from factorize.plan.policy import Policy
from factorize.plan.ranks import plan_ranks, plan_summary
from factorize.spectra.sites import decompose_sites, leading_sites, values_sites


def _excess(model, plan, spectra) -> float:
    """Worst ||W - B A||_F over the Eckart-Young-Mirsky optimum (numpy.linalg.svd) across factored layers, minus 1."""
    worst = 0.0
    for name, r in plan_ranks(plan).items():
        site = next(s for s in walk(model).sites if s.name == name)
        W = matrix_of(get_module(model, name), site.kind).detach().double().numpy()
        s = np.linalg.svd(W, compute_uv=False)
        B, A = (t.detach() for t in spectra[name].factors(r))
        worst = max(worst, np.linalg.norm(W - (B @ A).double().numpy()) / np.sqrt((s[r:] ** 2).sum()) - 1)
    return worst


def test_values_sites_then_leading_sites(mlp):
    sites = walk(mlp).sites
    values = values_sites(mlp, sites, keep_gram=True)
    full = decompose_sites(mlp, sites, method="exact")
    for s in sites:
        want = full[s.name].energies()
        np.testing.assert_allclose(values[s.name].energies(), want, atol=1e-5 * want[0])
    ranks = {sites[0].name: 4}
    out = leading_sites(mlp, sites, ranks, values)
    assert out[sites[0].name].vector_rank == 4 and out[sites[1].name] is values[sites[1].name]
    assert all(v.gram is None for v in values.values())  # the kept Gram matrices are released once used


def test_budget_route_keeps_the_plan_and_the_one_percent_guard(mlp):
    # The values-first route (float32 Gram eigenvalues) against the whole-spectrum route (float64 Gram): the same
    # allocation up to rounding, the kept fraction within the budget, and factors within 1% of Eckart-Young.
    for budget in (0.5, 0.3):
        new = compress(mlp, budget=budget, example=torch.randn(2, 24))
        old = compress(mlp, budget=budget, method="gram", example=torch.randn(2, 24))
        assert plan_ranks(new.plan) == plan_ranks(old.plan)
        assert plan_summary(new.plan)["kept_fraction"] <= budget + 1e-9
        assert _excess(mlp, new.plan, new.spectra) <= 0.01
        assert any(spec.method.startswith("leading") for spec in new.spectra.values())


def test_sweep_reuses_one_decomposition_within_the_guard(mlp):
    budgets = (0.6, 0.4, 0.25)
    spectra = sweep_spectra(mlp, [Policy.from_keywords(budget=b) for b in budgets])
    assert spectra is not None
    for b in budgets:
        alone = compress(mlp, budget=b, example=torch.randn(2, 24))
        reused = compress(mlp, budget=b, spectra=spectra, example=torch.randn(2, 24))
        assert plan_ranks(reused.plan) == plan_ranks(alone.plan)  # the same allocation from the same values
        assert _excess(mlp, reused.plan, reused.spectra) <= 0.01  # each cut of the shared block keeps the guard
    assert sweep_spectra(mlp, [Policy.from_keywords(budget=0.5, method="exact")]) is None  # not this route
