"""Tests for factorize/models.py: every way of naming a model, and the clear errors for bad ones."""

from __future__ import annotations

import json
import struct
import sys
import textwrap

import pytest
import torch
from safetensors.torch import save_file

from factorize.checkpoints.models import load_model
from factorize.errors import FactorizeError
from factorize.storage import check_safetensors

USER_MODULE = """
import torch
from torch import nn

class Net(nn.Module):
    def __init__(self):
        super().__init__()
        self.fc1 = nn.Linear(6, 8)
        self.fc2 = nn.Linear(8, 3)

    def forward(self, x):
        return self.fc2(torch.relu(self.fc1(x)))

def build():
    torch.manual_seed(0)
    return Net()

def not_a_model():
    return {"fc1": 1}

def needs_args(width):
    return Net()

instance = Net()
"""


@pytest.fixture
def user_module(tmp_path, monkeypatch, request):
    """A user's own module in the working directory, under a unique name (imports are cached per process)."""
    name = f"usermodels_{request.node.name.replace('[', '_').replace(']', '_').replace('-', '_')}"
    (tmp_path / f"{name}.py").write_text(textwrap.dedent(USER_MODULE))
    monkeypatch.chdir(tmp_path)
    yield name
    sys.modules.pop(name, None)


def test_callable_builds_the_module_and_a_fresh_instance(user_module) -> None:
    loaded = load_model(f"{user_module}:build")
    assert loaded.kind == "callable" and not loaded.weights_only
    assert isinstance(loaded.model, torch.nn.Module) and not loaded.model.training
    fresh = loaded.build()
    assert fresh is not loaded.model and type(fresh).__name__ == "Net"
    # a class works too, and so does a module-level instance
    assert type(load_model(f"{user_module}:Net").model).__name__ == "Net"
    assert load_model(f"{user_module}:instance").model is sys.modules[user_module].instance


def test_callable_errors_are_clear(user_module) -> None:
    with pytest.raises(FactorizeError, match=r"returned dict, not a torch\.nn\.Module"):
        load_model(f"{user_module}:not_a_model")
    with pytest.raises(FactorizeError, match="no arguments failed"):
        load_model(f"{user_module}:needs_args")
    with pytest.raises(FactorizeError, match="has no attribute 'missing'"):
        load_model(f"{user_module}:missing")
    with pytest.raises(FactorizeError, match="cannot import 'no_such_pkg_xyz'"):
        load_model("no_such_pkg_xyz.models:build")


def test_weights_load_strictly_and_list_every_bad_key(user_module, tmp_path) -> None:
    src = load_model(f"{user_module}:build").model
    good = tmp_path / "good.safetensors"
    state = {k: v.clone() + 1 for k, v in src.state_dict().items()}
    save_file(state, str(good))
    loaded = load_model(f"{user_module}:build", weights=good)
    torch.testing.assert_close(loaded.model.fc1.weight, state["fc1.weight"])
    bad = tmp_path / "bad.safetensors"
    save_file({"fc1.weight": torch.zeros(8, 5), "fc2.weight": torch.zeros(3, 8), "extra.bias": torch.zeros(2)},
              str(bad))
    with pytest.raises(FactorizeError) as err:
        load_model(f"{user_module}:build", weights=bad)
    problems = err.value.problems
    assert "missing: fc1.bias (expected shape [8])" in problems
    assert "missing: fc2.bias (expected shape [3])" in problems
    assert "unexpected: extra.bias (shape [2])" in problems
    assert "wrong shape: fc1.weight: file has [8, 5], model expects [8, 6]" in problems
    assert len(problems) == 4 and "bad.safetensors" in str(err.value)


def _write_checkpoint(path, tensors):
    save_file(tensors, str(path))
    return path.read_bytes()


def test_damaged_safetensors_files_are_named_with_the_problem(tmp_path) -> None:
    blob = _write_checkpoint(tmp_path / "ok.safetensors", {"w": torch.randn(16, 16)})
    (n,) = struct.unpack("<Q", blob[:8])
    cases = {
        "tiny.safetensors": (blob[:5], "too short to hold the 8-byte header length"),
        "cut.safetensors": (blob[: 8 + n + 100], "claims tensor data up to byte .* truncated"),
        "claim.safetensors": (struct.pack("<Q", n + 10_000) + blob[8:], f"header claims {n + 10_000} bytes"),
        "json.safetensors": (blob[:8] + b"{" * n + blob[8 + n:], "not valid UTF-8 JSON"),
    }
    for name, (data, message) in cases.items():
        (tmp_path / name).write_bytes(data)
        with pytest.raises(FactorizeError, match=message) as err:
            load_model(str(tmp_path / name))
        assert name in str(err.value) and "Fix:" in str(err.value)
    assert check_safetensors(tmp_path / "ok.safetensors") == {}  # valid file, no metadata
    with pytest.raises(FactorizeError, match="no such file"):
        load_model(str(tmp_path / "absent.safetensors"))
    with pytest.raises(FactorizeError, match="not a model factorize can read"):
        (tmp_path / "notes.txt").write_text("hello")
        load_model(str(tmp_path / "notes.txt"))


def test_bare_safetensors_is_weights_only_mode(tmp_path) -> None:
    _write_checkpoint(tmp_path / "w.safetensors", {"a.weight": torch.randn(4, 5), "a.bias": torch.randn(4)})
    loaded = load_model(str(tmp_path / "w.safetensors"))
    assert loaded.weights_only and loaded.kind == "weights" and loaded.path == tmp_path / "w.safetensors"
    assert loaded.tensors is None  # streamed by factorize.outofcore.weights_only, never loaded whole


def test_pickle_is_refused_by_default_and_loads_tensors_only_when_allowed(tmp_path, user_module) -> None:
    state = load_model(f"{user_module}:build").model.state_dict()
    pt = tmp_path / "model.pt"
    torch.save(state, pt)
    with pytest.raises(FactorizeError, match="arbitrary code") as err:
        load_model(str(pt))
    assert "--allow-pickle" in str(err.value) and "save_file" in str(err.value)
    loaded = load_model(str(pt), allow_pickle=True)
    assert loaded.weights_only and set(loaded.tensors) == set(state)
    # as --weights into an architecture
    model = load_model(f"{user_module}:build", weights=pt, allow_pickle=True).model
    torch.testing.assert_close(model.fc2.weight, state["fc2.weight"])

    import fractions  # any class outside torch's allow-list is refused by torch.load(weights_only=True)

    evil = tmp_path / "evil.pt"
    torch.save({"x": fractions.Fraction(1, 3)}, evil)
    with pytest.raises(FactorizeError, match="weights_only=True"):
        load_model(str(evil), allow_pickle=True)


def test_transformers_directory_loads_with_its_head(tmp_path) -> None:
    transformers = pytest.importorskip("transformers")
    cfg = transformers.BertConfig(vocab_size=40, hidden_size=16, num_hidden_layers=1, num_attention_heads=2,
                                  intermediate_size=24, max_position_embeddings=16)
    torch.manual_seed(0)
    bert = transformers.BertForSequenceClassification(cfg).eval()
    bert.save_pretrained(tmp_path / "bert")
    loaded = load_model(str(tmp_path / "bert"))
    assert loaded.kind == "transformers" and type(loaded.model).__name__ == "BertForSequenceClassification"
    ids = torch.randint(0, 40, (2, 5))
    torch.testing.assert_close(loaded.model(input_ids=ids).logits, bert(input_ids=ids).logits)
    assert loaded.tokenizer is None  # no tokenizer files were saved
    assert type(loaded.build()).__name__ == "BertForSequenceClassification"
    # a directory without config.json, or with only pickled weights
    (tmp_path / "empty").mkdir()
    with pytest.raises(FactorizeError, match=r"without config\.json"):
        load_model(str(tmp_path / "empty"))
    (tmp_path / "bert" / "model.safetensors").rename(tmp_path / "bert" / "pytorch_model.bin")
    with pytest.raises(FactorizeError, match="arbitrary code"):
        load_model(str(tmp_path / "bert"))


def test_missing_transformers_names_the_hf_extra(tmp_path, monkeypatch) -> None:
    d = tmp_path / "m"
    d.mkdir()
    (d / "config.json").write_text(json.dumps({"model_type": "bert"}))
    _write_checkpoint(d / "model.safetensors", {"w": torch.zeros(2, 2)})
    monkeypatch.setitem(sys.modules, "transformers", None)  # makes `import transformers` fail
    with pytest.raises(FactorizeError, match=r'pip install "\.\[hf\]"'):  # the extra, from a checkout
        load_model(str(d))


def test_weights_without_a_callable_is_a_usage_error(tmp_path) -> None:
    _write_checkpoint(tmp_path / "w.safetensors", {"w": torch.zeros(2, 2)})
    with pytest.raises(FactorizeError, match="--weights goes with"):
        load_model(str(tmp_path / "w.safetensors"), weights=tmp_path / "w.safetensors")
