"""How an embedding model's users judge it: do the embeddings still say which inputs are alike?

* :func:`neighbour_agreement`: for each input, is its nearest other input (by cosine) the same under the
  compressed model as under the original (the retrieval view of an encoder, common practice);
* :func:`similarity_spearman`: Spearman's rank correlation (Spearman 1904) between the two models' pairwise cosine
  similarities over every pair of distinct inputs (the view of semantic-similarity benchmarks, common practice);
* :func:`average_ranks` / :func:`spearman`: ranks with ties given their average rank, and Pearson's correlation of
  those ranks, which is Spearman's coefficient (tests check both against ``scipy.stats``).

Both measures compare N x N similarity matrices, so they are computed on the first :data:`NEIGHBOUR_LIMIT`
inputs at most (the count used is reported beside them).
"""

from __future__ import annotations

import math

import torch

NEIGHBOUR_LIMIT = 2048  # inputs compared pairwise at most: 2048^2 float64 similarities are 32 MiB per model


def cosine_matrix(x: torch.Tensor) -> torch.Tensor:
    """(N, N) cosine similarities of the rows of ``x`` (N, d), in float64; an all-zero row has similarity 0."""
    x = x.detach().to(torch.float64).reshape(x.shape[0], -1)
    unit = x / x.norm(dim=1, keepdim=True).clamp_min(torch.finfo(torch.float64).tiny)
    return unit @ unit.T


def neighbour_agreement(reference: torch.Tensor, candidate: torch.Tensor) -> float:
    """Fraction of the N >= 3 inputs whose nearest other input by cosine is the same for both (N, d) embeddings
    (ties go to the lowest index, as ``argmax`` gives)."""
    n = reference.shape[0]
    eye = torch.eye(n, dtype=torch.bool)
    nearest = [cosine_matrix(e).masked_fill(eye, -math.inf).argmax(1) for e in (reference, candidate)]  # (N,)
    return float((nearest[0] == nearest[1]).double().mean())


def average_ranks(x: torch.Tensor) -> torch.Tensor:
    """Ranks 1..n of a 1-D tensor, ties sharing the mean of the ranks they span (the 'average' method)."""
    order = torch.argsort(x, stable=True)
    xs = x[order]
    new = torch.ones(x.numel(), dtype=torch.bool)
    new[1:] = xs[1:] != xs[:-1]  # (n,) True where a run of equal values starts
    group = torch.cumsum(new.to(torch.int64), 0) - 1  # (n,) run index of each sorted value
    starts = torch.nonzero(new).flatten()  # (g,) first sorted position of each run
    ends = torch.cat([starts[1:], torch.tensor([x.numel()])])  # (g,) one past its last
    mean_rank = (starts + 1 + ends).to(torch.float64) / 2  # mean of ranks start+1 .. end
    ranks = torch.empty(x.numel(), dtype=torch.float64)
    ranks[order] = mean_rank[group]
    return ranks


def spearman(a: torch.Tensor, b: torch.Tensor) -> float:
    """Spearman's rank correlation of two 1-D tensors: Pearson's correlation of their average ranks (nan when
    either is constant)."""
    ra, rb = average_ranks(a.flatten()), average_ranks(b.flatten())
    ra, rb = ra - ra.mean(), rb - rb.mean()
    den = float(ra.norm() * rb.norm())
    return float((ra * rb).sum()) / den if den > 0 else math.nan


def similarity_spearman(reference: torch.Tensor, candidate: torch.Tensor) -> float:
    """Spearman's rank correlation between the two models' cosine similarities over the N (N - 1) / 2 pairs of
    distinct inputs, N >= 3."""
    n = reference.shape[0]
    upper = torch.triu_indices(n, n, offset=1)  # (2, pairs)
    sa, sb = (cosine_matrix(e)[upper[0], upper[1]] for e in (reference, candidate))
    return spearman(sa, sb)


def embedding_agreement(reference: torch.Tensor, candidate: torch.Tensor) -> dict[str, float]:
    """``neighbour_agreement``, ``similarity_spearman`` and ``neighbour_samples`` (the inputs compared: the first
    :data:`NEIGHBOUR_LIMIT`) for two (N, d) embeddings; empty with fewer than 3 inputs, where a nearest other
    input and a ranking of pairs say nothing."""
    n = min(int(reference.shape[0]), NEIGHBOUR_LIMIT)
    if n < 3:
        return {}
    a, b = reference[:n], candidate[:n]
    return {"neighbour_agreement": neighbour_agreement(a, b), "similarity_spearman": similarity_spearman(a, b),
            "neighbour_samples": n}
