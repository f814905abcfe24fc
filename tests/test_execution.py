"""The execution object: validated once, passed whole, and the loose keywords it replaces give the same bytes.

Outside reference: the singular values a run computes are checked against numpy.linalg.svd, so the equality of the
two call forms is not an equality of two wrong answers.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
import torch

from factorize import walk
from factorize.errors import FactorizeError
from factorize.execution import Execution, resolve_execution
from factorize.model.sites import get_module, matrix_of
from factorize.spectra.decompose import leading
from factorize.spectra.sites import decompose_sites, leading_sites, values_sites


@pytest.mark.parametrize("kwargs, text", [
    ({"precision": "float16"}, "unknown precision"),
    ({"workers": 0}, "workers= must be an integer >= 1"),
    ({"workers": True}, "workers= must be an integer >= 1"),
    ({"threads": 0}, "threads= must be an integer >= 1"),
    ({"seed": 1.5}, "seed= must be an integer"),
])
def test_bad_values_are_refused_when_built(kwargs, text):
    with pytest.raises(FactorizeError, match=text):
        Execution(**kwargs)


def test_frozen_and_replace_validates_again():
    ex = Execution(workers=2, seed=np.int64(3))  # numpy integers are integers, as the Policy's seed allows
    with pytest.raises(dataclasses.FrozenInstanceError):
        ex.workers = 3  # type: ignore[misc]
    assert ex.replace(progress=True) == Execution(workers=2, seed=3, progress=True)
    with pytest.raises(FactorizeError, match="unknown precision"):
        ex.replace(precision="half")


def test_object_or_keywords_never_both():
    ex, rest = resolve_execution(None, {"precision": "float64", "oversample": 4})
    assert ex == Execution(precision="float64") and rest == {"oversample": 4}
    with pytest.raises(FactorizeError, match="both given") as info:
        resolve_execution(Execution(), {"workers": 2})
    assert "workers=" in str(info.value)


def test_spectra_take_the_object_whole_with_the_keywords_bytes(mlp):
    sites = walk(mlp).sites
    by_keywords = decompose_sites(mlp, sites, method="randomized", ranks={s.name: 4 for s in sites}, seed=7,
                                  precision="float64", workers=2)
    whole = decompose_sites(mlp, sites, method="randomized", ranks={s.name: 4 for s in sites},
                            execution=Execution(seed=7, precision="float64", workers=2))
    for s in sites:
        assert torch.equal(by_keywords[s.name].S, whole[s.name].S)
        assert torch.equal(by_keywords[s.name].U, whole[s.name].U)
        W = matrix_of(get_module(mlp, s.name), s.kind).detach().double().numpy()
        # a randomized SVD takes the singular values of Q^T W, which never exceed those of W (interlacing: Horn &
        # Johnson, Matrix Analysis, Cor. 3.1.3 -- cited from memory); W's from numpy.linalg.svd
        assert np.all(whole[s.name].S[:4].numpy() <= np.linalg.svd(W, compute_uv=False)[:4] * (1 + 1e-9))
        assert whole[s.name].S.dtype == torch.float64  # precision= reached the solver
    values = values_sites(mlp, sites, execution=Execution(precision="float64"))
    ranks = {sites[0].name: 3}
    a = leading_sites(mlp, sites, ranks, values, execution=Execution(seed=5, precision="float64"))
    W = matrix_of(get_module(mlp, sites[0].name), sites[0].kind)
    b = leading(W, 3, values=values[sites[0].name], seed=5, precision="float64", name=sites[0].name)
    assert torch.equal(a[sites[0].name].U, b.U) and torch.equal(a[sites[0].name].Vh, b.Vh)


def test_unknown_keyword_is_named(mlp):
    with pytest.raises(FactorizeError, match="unknown keyword: speed"):
        values_sites(mlp, walk(mlp).sites, speed=2)
    with pytest.raises(FactorizeError, match="both given"):
        values_sites(mlp, walk(mlp).sites, execution=Execution(), workers=2)
