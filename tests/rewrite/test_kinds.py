"""The registry of layer kinds: one record per kind the walker recognises, and one rank-r builder.

The lower-rank copy (:func:`at_rank`) is checked against numpy's SVD of the layer's matrix: truncating the
product B @ A to rank k gives the best rank-k approximation (Eckart-Young-Mirsky), so the copy's product must
equal numpy's rank-k truncation of the full-rank layer's matrix.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from torch import nn

from factorize import decompose
from factorize.model.sites import KINDS, matrix_of
from factorize.rewrite.kinds import layer_kind, registered_kinds
from factorize.rewrite.layers import at_rank, factor_module, to_dense
from tests.rewrite.test_layers import CASES


def test_every_kind_of_the_walker_has_one_record():
    assert sorted(registered_kinds()) == sorted(KINDS)
    assert all(layer_kind(k).name == k for k in KINDS)


def test_an_unknown_kind_is_refused():
    with pytest.raises(ValueError, match="unknown kind 'lstm'"):
        layer_kind("lstm")


@pytest.mark.parametrize("kind,make,inputs", CASES)
def test_at_rank_is_the_truncated_svd_and_keeps_the_layer_shape(kind, make, inputs):
    torch.manual_seed(0)
    module = make().double()
    W = matrix_of(module, kind).detach()
    spec = decompose(W, precision="float64")
    full = factor_module(module, kind, *spec.factors(spec.computed_rank))
    k = max(1, spec.computed_rank // 2)
    lower = at_rank(full, *spec.factors(k))
    assert lower.rank == k and full.rank == spec.computed_rank  # the original is not modified
    U, s, Vt = np.linalg.svd(W.numpy(), full_matrices=False)  # reference: numpy's SVD
    np.testing.assert_allclose(lower.product().detach().numpy(), (U[:, :k] * s[:k]) @ Vt[:k], atol=1e-10)
    assert lower.weight.shape == module.weight.shape  # the replaced module's layout
    assert type(to_dense(lower)) is type(module)
    x = inputs()
    x = x.double() if x.is_floating_point() else x
    assert lower(x).shape == module(x).shape


def test_at_rank_keeps_a_frozen_layer_frozen():
    module = nn.Embedding(20, 6)
    module.weight.requires_grad_(False)
    spec = decompose(matrix_of(module, "embedding").detach(), precision="float64")
    layer = factor_module(module, "embedding", *spec.factors(6))
    lower = at_rank(layer, *spec.factors(3))
    assert not any(p.requires_grad for p in lower.parameters())
