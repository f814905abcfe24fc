"""Tests for factorize/recipe.py and the shipped recipes/*.toml, each exercised on a model of its kind
(transformers' BertModel and GPT2LMHeadModel built from tiny configs, no download; a small CNN and MLP built here)."""

from __future__ import annotations

import pytest
import torch
from conftest import tiny_bert, tiny_gpt2
from torch import nn

import factorize
from factorize.errors import FactorizeError
from factorize.measure.drift import output_drift
from factorize.plan.ranks import Override
from factorize.plan.recipe import RECIPES_DIR, load_recipe, parse_recipe, shipped_recipes
from factorize.rewrite.layers import factored_layers


def _factored(model) -> set[str]:
    return set(factored_layers(model))


def test_every_shipped_recipe_parses_and_documents_its_keys() -> None:
    names = {p.name for p in shipped_recipes()}
    assert {"mlp-classifier.toml", "bert-encoder.toml", "gpt-decoder.toml", "cnn.toml"} <= names
    for path in shipped_recipes():
        recipe = load_recipe(path)
        assert recipe.description and len(recipe.policy) == 1
        text = path.read_text()
        assert "# Keys" in text and "[[layer]]" in text and "[policy]" in text  # documented at the top


def test_parse_recipe_maps_keys_to_compress_arguments() -> None:
    recipe = parse_recipe({
        "recipe": 1, "include": "blocks.*", "exclude": ["*head"], "method": "randomized", "multiple": 8,
        "policy": {"energy": 0.9}, "layer": [{"match": "blocks.0.*", "rank": 16}, {"match": "*gate", "dense": True}],
    })
    kwargs = recipe.compress_kwargs()
    assert kwargs["energy"] == 0.9 and kwargs["include"] == ["blocks.*"] and kwargs["exclude"] == ["*head"]
    assert kwargs["method"] == "randomized" and kwargs["multiple"] == 8
    assert kwargs["overrides"] == [Override("blocks.0.*", rank=16), Override("*gate", dense=True)]


def test_bad_recipes_list_every_problem(tmp_path) -> None:
    with pytest.raises(FactorizeError) as err:
        parse_recipe({"polcy": {}, "method": "fast", "multiple": "8", "layer": [{"match": "x", "dense": False},
                                                                               {"rank": 3}]})
    problems = "\n".join(err.value.problems)
    for text in ("unknown key 'polcy'", "method = 'fast'", "multiple must be an integer", "[policy] is missing",
                 "dense must be true", "#2: needs match"):
        assert text in problems, text
    with pytest.raises(FactorizeError, match="exactly one of"):
        parse_recipe({"policy": {"budget": 0.5, "rank": 4}})
    with pytest.raises(FactorizeError, match=r"budget must be a fraction in \(0, 1\]"):
        parse_recipe({"policy": {"budget": 1.5}})
    (tmp_path / "bad.toml").write_text("[policy\nbudget = 0.5\n")
    with pytest.raises(FactorizeError, match="not valid TOML"):
        load_recipe(tmp_path / "bad.toml")
    with pytest.raises(FactorizeError, match="no such recipe file"):
        load_recipe(tmp_path / "absent.toml")


def test_bare_name_finds_a_shipped_recipe(monkeypatch, tmp_path) -> None:
    monkeypatch.chdir(tmp_path)
    assert load_recipe("cnn.toml").source == str(RECIPES_DIR / "cnn.toml")


# --- each shipped recipe on a model of its kind -------------------------------------------------------------------


def test_mlp_recipe_on_the_embedded_digits_model() -> None:
    from factorize.default import load_default, load_digits_split

    model = load_default()
    result = factorize.compress(model, **load_recipe(RECIPES_DIR / "mlp-classifier.toml").compress_kwargs())
    assert result.plan["policy"]["budget"] == 0.5
    assert "fc2" in _factored(result.model) and "fc4" not in _factored(result.model)  # fc4: thin class head
    x, y = load_digits_split("test")  # held-out split of the UCI digits data (Alpaydin & Kaynak)
    acc = (result.model(x).argmax(1) == y).double().mean().item()
    assert acc >= 0.94, acc  # measured 0.9685 for the original (factorize/default/README.md)


def test_bert_recipe_keeps_embeddings_and_pooler_dense() -> None:
    model = tiny_bert()  # transformers.BertModel from a tiny config
    result = factorize.compress(model, **load_recipe(RECIPES_DIR / "bert-encoder.toml").compress_kwargs())
    names = set(result.plan["sites"])
    per_layer = {"attention.self.query", "attention.self.key", "attention.self.value", "attention.output.dense",
                 "intermediate.dense", "output.dense"}
    assert names == {f"encoder.layer.{i}.{p}" for i in range(2) for p in per_layer}  # the include list, nothing else
    assert _factored(result.model), "the budget factors some projections"
    assert not any("embeddings" in n or "pooler" in n for n in _factored(result.model))
    ids = torch.randint(0, 64, (3, 10), generator=torch.Generator().manual_seed(0))
    d = output_drift(model(input_ids=ids).last_hidden_state, result.model(input_ids=ids).last_hidden_state)
    assert 0 < d["relative_l2"] < 1


def test_gpt_recipe_factors_transposed_projections_and_leaves_the_tied_head() -> None:
    model = tiny_gpt2()  # transformers.GPT2LMHeadModel: Conv1D projections, lm_head tied to wte
    result = factorize.compress(model, **load_recipe(RECIPES_DIR / "gpt-decoder.toml").compress_kwargs())
    sites = result.plan["sites"]
    assert {e["kind"] for e in sites.values()} == {"transposed"}
    assert {n.rsplit(".", 1)[-1] for n in sites} == {"c_attn", "c_proj", "c_fc"}
    # the override takes c_attn out of the budget pool (on random tiny weights, 95% energy needs a rank past
    # break-even, so it stays dense, with that reason)
    assert all("budget=" not in e["reason"] for n, e in sites.items() if n.endswith("c_attn"))
    assert any("budget=" in e["reason"] for n, e in sites.items() if n.endswith("c_fc"))
    assert result.model.lm_head.weight is result.model.transformer.wte.weight  # still tied
    ids = torch.randint(0, 64, (2, 8), generator=torch.Generator().manual_seed(1))
    assert result.model(ids).logits.shape == (2, 8, 64)


class _SmallCNN(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.stem = nn.Conv2d(3, 16, 3, padding=1)
        self.block = nn.Sequential(nn.Conv2d(16, 32, 3, padding=1), nn.ReLU(), nn.Conv2d(32, 32, 3, padding=1))
        self.fc = nn.Linear(32, 10)

    def forward(self, x):
        h = torch.relu(self.stem(x))
        return self.fc(self.block(h).mean((2, 3)))


def test_cnn_recipe_keeps_energy_per_layer_and_the_stem_dense() -> None:
    torch.manual_seed(0)
    model = _SmallCNN().eval()
    result = factorize.compress(model, **load_recipe(RECIPES_DIR / "cnn.toml").compress_kwargs())
    sites = result.plan["sites"]
    assert sites["stem"]["action"] == "dense" and "override" in sites["stem"]["reason"]
    for name in ("block.0", "block.2"):
        e = sites[name]
        assert e["action"] == "factor" and e["energy_kept"] >= 0.9
        assert e["predicted_error"] <= (1 - 0.9) ** 0.5 + 1e-9  # Eckart-Young: error^2 = discarded energy
    x = torch.randn(2, 3, 8, 8)
    assert result.model(x).shape == (2, 10)


def test_transformer_recipes_say_they_need_calibration_text(tmp_path):
    import io

    from factorize.cli import main
    from factorize.plan.recipe import load_recipe

    for name in ("bert-encoder.toml", "gpt-decoder.toml"):
        assert "text" in load_recipe(name).calibration
    assert load_recipe("mlp-classifier.toml").calibration == ""
    out, err = io.StringIO(), io.StringIO()  # the terminal warns when such a recipe runs without --calibration
    main(["shrink", "-m", "factorize.default:load_default", "--recipe", "bert-encoder.toml", "-o",
          str(tmp_path / "x.safetensors")], stdout=out, stderr=err)
    assert "needs calibration inputs" in err.getvalue()


def test_recipes_ship_inside_the_package():
    # an installed wheel has no source checkout around it: the recipes must live in the package and be listed as
    # package data (checked by building a wheel once: factorize/recipes/*.toml are in it)
    import sys
    from pathlib import Path

    import factorize
    from factorize.plan.recipe import RECIPES_DIR, shipped_recipes

    if sys.version_info >= (3, 11):
        import tomllib
    else:  # pragma: no cover
        import tomli as tomllib
    package = Path(factorize.__file__).resolve().parent
    assert RECIPES_DIR.resolve().parent == package and len(shipped_recipes()) >= 4
    pyproject = tomllib.loads((package.parent / "pyproject.toml").read_text())
    assert "recipes/*.toml" in pyproject["tool"]["setuptools"]["package-data"]["factorize"]
