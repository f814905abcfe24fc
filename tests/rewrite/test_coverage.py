"""Coverage: every model in the zoo (transformers classes from tiny configs with random weights, plain torch models)
still runs after ``compress(budget=0.5)``, reproduces its outputs when factored at full rank, merges back to its
original classes and keys, and has every weight matrix either as a site or skipped with a reason.

Outside references: transformers' own model classes (built from tiny configs) and torch.nn layers. Full-rank
factors reproduce the weight exactly up to rounding (the SVD is exact at full rank, Eckart & Young 1936), so the
outputs must agree within float32 rounding (1e-4, the target of issue 13).

``python tests/rewrite/test_coverage.py`` prints the table kept in docs/coverage.md.
"""

from __future__ import annotations

import sys
from pathlib import Path

import pytest
import torch

sys.path.insert(0, str(Path(__file__).parent))

from zoo import TRANSFORMERS, ZOO, build

import factorize
from factorize.model.feed import feed, primary_output
from factorize.model.sites import get_module, walk
from factorize.plan.ranks import PLAN_FORMAT
from factorize.rewrite.verify import check_runs

TOL = 1e-4


def full_rank_plan(model) -> dict:
    """Every untied site factored at its full rank (tied sites stay dense: factoring one owner unties them)."""
    sites = {s.name: {"kind": s.kind, "shape": list(s.shape), "rank": s.max_rank, "action": "factor"}
             for s in walk(model) if not s.tied_with}
    return {"format": PLAN_FORMAT, "version": 1, "sites": sites}


def uncovered_weights(model) -> list[str]:
    """Parameters with 2+ dimensions that are neither a site's weight nor held by a skipped layer or entry."""
    found = walk(model)
    covered = {s.name for s in found} | {s.name for s in found.skipped}
    out = []
    for name, p in model.named_parameters():
        owner = name.rpartition(".")[0]
        if p.dim() >= 2 and name not in covered and owner not in covered:
            out.append(name)
    return out


def _out(model, batch) -> torch.Tensor:
    with torch.no_grad():
        return primary_output(feed(model, batch)).float()


def measure(name: str) -> dict:
    """One row of the coverage table."""
    model, batch = build(name)
    row = {"model": name, "sites": len(walk(model)), "skipped": len(walk(model).skipped)}
    ref = _out(model, batch)
    compressed = factorize.compress(model, budget=0.5)
    err = check_runs(compressed.model, batch)
    row["runs"] = err is None
    row["run_error"] = None if err is None else f"{type(err).__name__}: {err}"[:200]
    row["kept"] = round(compressed.kept_fraction, 3)
    full = factorize.apply_plan(model, full_rank_plan(model))
    row["full_rank_max_error"] = float((_out(full, batch) - ref).abs().max())
    merged = factorize.merge(full)
    row["merge_class"] = all(type(get_module(merged, n)) is type(get_module(model, n))
                             for n in full_rank_plan(model)["sites"])
    row["merge_keys"] = list(merged.state_dict()) == list(model.state_dict())
    row["merge_max_error"] = float((_out(merged, batch) - ref).abs().max())
    row["uncovered"] = uncovered_weights(model)
    row["save_load_exact"] = _save_load_exact(name, compressed, batch)
    return row


def _save_load_exact(name: str, compressed, batch) -> bool:
    """factorize.save, then factorize.load into a fresh instance of the same architecture: outputs equal."""
    import tempfile

    with tempfile.TemporaryDirectory() as tmp:
        path = factorize.save(compressed.model, Path(tmp) / "m.safetensors", plan=compressed.plan)
        fresh = factorize.load(build(name)[0], path)
    return bool(torch.equal(_out(fresh, batch), _out(compressed.model, batch)))


FAST = [n for n, (_, _, fast) in ZOO.items() if fast]
SLOW = [n for n in ZOO if n not in FAST]


def _check(name: str) -> None:
    if name in TRANSFORMERS:
        pytest.importorskip("transformers")
    row = measure(name)
    assert row["runs"], row["run_error"]
    assert row["full_rank_max_error"] < TOL, row
    assert row["merge_class"] and row["merge_keys"], row
    assert row["merge_max_error"] < TOL, row
    assert row["uncovered"] == [], row
    assert row["save_load_exact"], row


@pytest.mark.parametrize("name", FAST)
def test_model_runs_reproduces_and_merges(name):
    _check(name)


@pytest.mark.slow
@pytest.mark.parametrize("name", SLOW)
def test_model_runs_reproduces_and_merges_slow(name):
    _check(name)


def table() -> str:
    lines = ["| model | sites | skipped | runs after compress(budget=0.5) | kept | full-rank max error | "
             "merge restores classes and keys | every weight matrix covered | save/load exact |",
             "| --- | ---: | ---: | --- | ---: | ---: | --- | --- | --- |"]
    for name in ZOO:
        r = measure(name)
        lines.append(f"| {name} | {r['sites']} | {r['skipped']} | {'yes' if r['runs'] else 'NO: ' + r['run_error']} | "
                     f"{r['kept']} | {r['full_rank_max_error']:.1e} | "
                     f"{'yes' if r['merge_class'] and r['merge_keys'] else 'NO'} | "
                     f"{'yes' if not r['uncovered'] else 'NO: ' + ', '.join(r['uncovered'])} | "
                     f"{'yes' if r['save_load_exact'] else 'NO'} |")
    return "\n".join(lines)


if __name__ == "__main__":
    torch.set_num_threads(1)
    # run as a script, this prints the coverage table for the docs
    print(f"torch {torch.__version__}, transformers {__import__('transformers').__version__}, 1 thread\n")  # noqa: T201
    print(table())  # noqa: T201
