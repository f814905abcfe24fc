"""``sweep --drift-samples N``: every budget's drift on the same N sample inputs drawn at random, each mean cosine
with its 95% interval. Checked against the same samples given as a file (the rows must agree), against the full
measurement (the interval must be the t interval of those samples, scipy.stats as the reference library), and
for its errors (exit 2, nothing written)."""

from __future__ import annotations

import io
import json

import numpy as np
import pytest
import torch

from factorize.cli import main
from factorize.default.digits import load_digits_split
from factorize.measure.inputs import SampleInputs, random_subset

DEFAULT = ["-m", "factorize.default:load_default", "--budgets", "0.5,0.2", "--repeats", "0", "--json", "--quiet",
           "--no-calibration"]


def _sweep(argv: list[str]) -> tuple[int, dict | None, str]:
    out, err = io.StringIO(), io.StringIO()
    rc = main(["sweep", *argv], stdout=out, stderr=err)
    return rc, json.loads(out.getvalue()) if rc == 0 else None, err.getvalue()


def test_rows_are_the_drift_of_the_drawn_samples(tmp_path) -> None:
    rc, sub, _ = _sweep([*DEFAULT, "--drift-samples", "48", "--seed", "7"])
    assert rc == 0
    x, y = load_digits_split("test")  # the embedded default's held-out digits, what the sweep measures by default
    assert sub["drift_samples"] == {"measured": 48, "of": len(y), "seed": 7}
    # the same draw, made by hand and given as --inputs: the same rows (the model treats each sample on its own)
    _, idx = random_subset(SampleInputs(batches=list(x.split(64)), labels=y, count=len(y)), 48, 7)
    np.savez(tmp_path / "drawn.npz", x=x[idx].numpy(), labels=y[idx].numpy())
    rc, same, _ = _sweep([*DEFAULT, "--inputs", str(tmp_path / "drawn.npz")])
    assert rc == 0 and "drift_samples" not in same
    for a, b in zip(sub["rows"], same["rows"]):
        for key in ("cosine_mean", "cosine_mean_ci95", "cosine_min", "relative_l2", "accuracy_after"):
            assert a[key] == pytest.approx(b[key], rel=1e-5, abs=1e-9), key
        assert a["cosine_mean_ci95"] > 0


def test_the_draw_is_seeded_and_paired_across_budgets() -> None:
    x, y = load_digits_split("test")
    inputs = SampleInputs(batches=list(x.split(64)), labels=y, count=len(y))
    a, ia = random_subset(inputs, 30, 1)
    _, ib = random_subset(inputs, 30, 1)
    assert ia == ib and len(set(ia)) == 30 and ia == sorted(ia)
    assert torch.equal(torch.cat(a.batches), x[ia]) and torch.equal(a.labels, y[ia])
    _, ic = random_subset(inputs, 30, 2)
    assert ic != ia
    whole, every = random_subset(inputs, 10_000, 1)
    assert whole is inputs and every == list(range(len(y)))


def test_token_batches_lose_only_padding_no_row_uses() -> None:
    ids = torch.tensor([[5, 6, 7, 0], [5, 6, 0, 0], [5, 0, 0, 0]])
    batch = {"input_ids": ids, "attention_mask": (ids != 0).long(), "token_type_ids": torch.zeros_like(ids)}
    inputs = SampleInputs(batches=[batch], count=3)
    for seed in range(20):  # some draw keeps rows 1 and 2 only: two positions are padding in both
        sub, idx = random_subset(inputs, 2, seed)
        kept = sub.batches[0]
        longest = int((ids[idx] != 0).sum(1).max())
        assert kept["input_ids"].shape == (2, longest) and torch.equal(kept["input_ids"], ids[idx][:, :longest])
        assert torch.equal(kept["attention_mask"], batch["attention_mask"][idx][:, :longest])


def test_all_samples_when_n_is_not_smaller() -> None:
    rc, full, _ = _sweep([*DEFAULT])
    rc2, same, _ = _sweep([*DEFAULT, "--drift-samples", "100000"])
    assert rc == rc2 == 0 and "drift_samples" not in same
    assert [r["cosine_mean"] for r in full["rows"]] == [r["cosine_mean"] for r in same["rows"]]


@pytest.mark.parametrize("n", ["1", "0", "-3"])
def test_fewer_than_two_is_refused_before_loading(n, tmp_path) -> None:
    out = tmp_path / "s.csv"
    rc, _, err = _sweep([*DEFAULT, "--drift-samples", n, "--csv", str(out)])
    assert rc == 2 and "--drift-samples must be at least 2" in err and "Traceback" not in err
    assert not out.exists()


def test_weights_only_has_no_drift_to_sample(tmp_path) -> None:
    from safetensors.torch import save_file

    path = tmp_path / "w.safetensors"
    save_file({"fc.weight": torch.randn(16, 32)}, str(path))
    rc, _, err = _sweep(["-m", str(path), "--budgets", "0.5", "--drift-samples", "8", "--json"])
    assert rc == 2 and "--drift-samples needs a model to run" in err
