"""What each block is fed, computed by the model's own code: the embedding stage and the blocks' extra inputs.

Everything a transformers model does before its first block (token embeddings, GPT-2's and BERT's absolute
position embeddings, BERT's token-type embeddings and embedding LayerNorm, Gemma's scaling by sqrt(hidden), the
rotary cos/sin tables of Llama, Mistral, Qwen2, Phi (partial rotary) and Gemma, causal or bidirectional attention
masks with padding) is run by the model's own forward, not re-implemented here:

1. a copy of the meta-device model (:mod:`factorize.outofcore.architecture`) gets its blocks swapped for
   recorders, and everything outside the blocks except the output head is materialised on the CPU in float32
   from the checkpoint (position embeddings, norms: small beside one block). The token embedding table is vocab
   x hidden (256k x 2048 in float32 is 2.1 GB, more than a block), so when the calibration's token ids are
   given only their rows are read (:func:`factorize.storage.read_rows`) and a hook on the embedding module maps
   each id to its row: the module's own forward (a scale, a padding index) still runs, on the ids' rows;
2. each batch goes through the model's (base model's) forward: every recorder keeps the arguments its block
   would have received and passes the hidden states on unchanged; the last one stops the pass, so the final
   norm and the head never run;
3. the hidden states entering block 0 are the embedding stage's output; the other arguments (masks, position
   embeddings, position ids, flags) are each block's *extra inputs*, stored once per distinct set (the model
   hands the same mask and tables to every block of one attention type) and replayed by the block tasks.

Extra inputs are encoded as tensors (safetensors) plus a JSON description: tensors, tuples/lists of tensors,
None, booleans, numbers and strings. Anything else (a cache object, a flex-attention block mask) is a
FactorizeError naming the model type and the argument.
"""

from __future__ import annotations

import copy
import inspect
import json
from typing import Any

import torch

from factorize.errors import FactorizeError
from factorize.outofcore.architecture import Architecture, fill_from_checkpoint


class _Stop(Exception):
    """Raised by the last recorder: nothing after the blocks runs."""


class _Recorder(torch.nn.Module):
    """Stands in for block ``index``: records its arguments, returns its hidden states unchanged. Attributes the
    model reads from its blocks (an attention type, a layer index) come from the block it replaces."""

    def __init__(self, inner: torch.nn.Module, index: int, last: bool, calls: dict) -> None:
        super().__init__()
        object.__setattr__(self, "_inner", inner)  # not a submodule: its meta parameters stay out of the stem
        self.index, self.last, self.calls = index, last, calls

    def __getattr__(self, name: str):
        try:
            return super().__getattr__(name)
        except AttributeError:
            return getattr(object.__getattribute__(self, "_inner"), name)

    def forward(self, *args, **kwargs):
        if not args and isinstance(kwargs.get("hidden_states"), torch.Tensor):  # replayed as the first argument
            args = (kwargs.pop("hidden_states"),)
        if not args or not isinstance(args[0], torch.Tensor):
            raise FactorizeError(f"block {self.index} is not called with its hidden states as first argument",
                                 fix="shrink this model in memory (without --blockwise)")
        self.calls[self.index] = (args, kwargs)
        if self.last:
            raise _Stop
        return args[0]


class Stem:
    """The model outside its blocks, on the CPU, with recorders in place of the blocks (built once per run)."""

    def __init__(self, arch: Architecture, tokens: torch.Tensor | None = None) -> None:
        """``tokens``: every token id :meth:`run` will see (any order, repeats allowed); with them only those rows
        of the token embedding are materialised. Without them, the whole table."""
        self.arch = arch
        model = copy.deepcopy(arch.model)  # meta: no values copied
        rows = _compact_embedding(model, tokens)
        layers = model.get_submodule(arch.prefix)
        self.calls: dict[int, tuple] = {}
        self.missing: list[str] = []  # parameters outside the blocks the checkpoint lacks (NaN; an error if used)
        for i in range(len(layers)):
            layers[i] = _Recorder(layers[i], i, i == len(layers) - 1, self.calls)
        head = model.get_output_embeddings() if hasattr(model, "get_output_embeddings") else None
        names = {m: n for n, m in model.named_modules()}
        skip = names.get(head) if head is not None and head is not model.get_input_embeddings() else None
        for name, module in model.named_modules():
            if isinstance(module, _Recorder) or (skip is not None and (name == skip or name.startswith(skip + "."))):
                continue
            if any(True for _ in module.parameters(recurse=False)) or any(True for _ in module.buffers(recurse=False)):
                self.missing += fill_from_checkpoint(arch, module, name, recurse=False, missing_ok=True, rows=rows)
        base = getattr(model, "base_model", model)
        self.model = base.eval()
        params = inspect.signature(base.forward).parameters
        self.flags = {k: False for k in ("use_cache", "output_attentions", "output_hidden_states") if k in params}

    @torch.no_grad()
    def run(self, ids: torch.Tensor, mask: torch.Tensor | None, kinds: torch.Tensor | None = None
            ) -> tuple[torch.Tensor, list[tuple]]:
        """(hidden states entering block 0 (float32), per block (extra args, extra kwargs)); ``kinds``: token
        type ids (an encoder's sentence-pair segments), checked by :func:`factorize.outofcore.tokens.token_batches`
        against :func:`token_types`."""
        self.calls.clear()
        extra = {} if kinds is None else {"token_type_ids": kinds}
        try:
            self.model(input_ids=ids, attention_mask=mask, **extra, **self.flags)
        except _Stop:
            pass
        except (RuntimeError, IndexError, ValueError) as err:  # the model's own checks (positions, shapes)
            first = str(err).splitlines()[0] if str(err) else type(err).__name__
            limit = getattr(self.arch.config, "max_position_embeddings", None)
            raise FactorizeError(f"model_type {self.arch.model_type!r}: the model's forward up to its first block "
                                 f"fails on calibration sequences of {int(ids.shape[1])} tokens: {first}",
                                 fix="give token ids the model accepts" + (f" (at most {limit} tokens per sequence)"
                                                                           if limit else "")) from None
        if len(self.calls) != self.arch.blocks:
            raise FactorizeError(f"model_type {self.arch.model_type!r}: the model's forward called "
                                 f"{len(self.calls)} of its {self.arch.blocks} blocks",
                                 fix="shrink this model in memory (without --blockwise)")
        h = self.calls[0][0][0].float().contiguous()
        if not bool(torch.isfinite(h).all()):
            raise FactorizeError(f"model_type {self.arch.model_type!r}: the hidden states entering the first block "
                                 "are not finite" + (": the embedding stage uses parameters missing from the "
                                                     "checkpoint" if self.missing else ""), self.missing[:30],
                                 fix="pass a complete, unmodified transformers checkpoint")
        extras = [(self.calls[i][0][1:], self.calls[i][1]) for i in range(self.arch.blocks)]
        self.calls.clear()
        return h, extras


def token_types(arch: Architecture) -> int | None:
    """How many token types the model's embedding stage takes (``type_vocab_size``), or None when its forward has
    no ``token_type_ids``."""
    base = getattr(arch.model, "base_model", arch.model)
    if "token_type_ids" not in inspect.signature(base.forward).parameters:
        return None
    return int(getattr(arch.config, "type_vocab_size", 0) or 0) or None


def _compact_embedding(model: torch.nn.Module, tokens: torch.Tensor | None) -> dict[str, torch.Tensor]:
    """Shrink the (meta) token embedding of ``model`` to the rows of ``tokens`` and hook it so that each id looks
    up its row; returns {weight name: sorted distinct ids} for :func:`fill_from_checkpoint`. Nothing changes
    (an empty dict) without ``tokens`` or for an embedding that is not an ``nn.Embedding``."""
    emb = model.get_input_embeddings() if hasattr(model, "get_input_embeddings") else None
    if tokens is None or not isinstance(emb, torch.nn.Embedding):
        return {}
    ids = torch.unique(tokens.reshape(-1).long())  # sorted
    if len(ids) == 0 or int(ids[0]) < 0 or int(ids[-1]) >= emb.num_embeddings:
        return {}  # the model's own forward reports ids out of range
    name = next(n for n, m in model.named_modules() if m is emb)
    emb.weight = torch.nn.Parameter(torch.empty(len(ids), emb.embedding_dim, device="meta"), requires_grad=False)
    emb.num_embeddings, emb.padding_idx = len(ids), None  # the padding index only shapes gradients
    emb.register_forward_pre_hook(lambda module, args: (_row_of(ids, args[0]), *args[1:]))
    return {f"{name}.weight" if name else "weight": ids}


def _row_of(ids: torch.Tensor, tokens: torch.Tensor) -> torch.Tensor:
    """The row of each token id among the sorted ``ids``; an id not among them is an error (it would read
    another token's row)."""
    pos = torch.searchsorted(ids, tokens).clamp_(max=len(ids) - 1)
    if not torch.equal(ids[pos], tokens):
        raise FactorizeError("the embedding stage was given token ids outside those it was built for",
                             fix="report this: the calibration's ids are collected before the stage is built")
    return pos


# ---------------------------------------------------------------------------------------------------------------
# extra inputs: encoded once per distinct set, replayed by the block tasks


def encode_extras(extras: list[tuple], key: str, tensors: dict[str, torch.Tensor], model_type: str) -> dict:
    """Describe every block's extra inputs as JSON, their tensors put in ``tensors`` under ``key``; blocks
    given the very same objects share one set. Returns {"sets": [description...], "block": [set index...]}."""
    sets: list = []
    seen: dict[tuple, int] = {}
    block = []
    for args, kwargs in extras:
        sig = (tuple(_identity(a) for a in args), tuple((k, _identity(v)) for k, v in kwargs.items()))
        if sig not in seen:
            seen[sig] = len(sets)
            prefix = f"{key}.{len(sets)}"
            sets.append({"args": [_encode(a, f"{prefix}.a{n}", tensors, model_type, f"argument {n + 1}")
                                  for n, a in enumerate(args)],
                         "kwargs": {k: _encode(v, f"{prefix}.k.{k}", tensors, model_type, k)
                                    for k, v in kwargs.items()}})
        block.append(seen[sig])
    return {"sets": sets, "block": block}


def _identity(value: Any) -> Any:
    if isinstance(value, torch.Tensor):
        return ("t", id(value))
    if isinstance(value, (tuple, list)):
        return ("s", tuple(_identity(v) for v in value))
    return ("v", repr(value))


def _encode(value: Any, key: str, tensors: dict, model_type: str, what: str) -> Any:
    if isinstance(value, torch.Tensor):
        tensors[key] = value.detach().clone().contiguous()
        return {"tensor": key}
    if isinstance(value, (tuple, list)):
        return {"seq": [_encode(v, f"{key}.{n}", tensors, model_type, what) for n, v in enumerate(value)],
                "tuple": isinstance(value, tuple)}
    if value is None or isinstance(value, (bool, int, float, str)):
        return {"value": value}
    raise FactorizeError(f"model_type {model_type!r}: the model passes its blocks {what} of type "
                         f"{type(value).__name__}, which cannot be replayed block by block",
                         fix="shrink this model in memory (without --blockwise)")


def decode_extras(description: dict, block: int, tensors) -> tuple[tuple, dict]:
    """(extra args, extra kwargs) of ``block`` from :func:`encode_extras`' description; ``tensors`` maps a key
    to its tensor (a dict or a ``safe_open`` handle's ``get_tensor``)."""
    one = description["sets"][description["block"][block]]
    get = tensors.get_tensor if hasattr(tensors, "get_tensor") else tensors.__getitem__
    return (tuple(_decode(a, get) for a in one["args"]), {k: _decode(v, get) for k, v in one["kwargs"].items()})


def _decode(spec: dict, get) -> Any:
    if "tensor" in spec:
        return get(spec["tensor"])
    if "seq" in spec:
        items = [_decode(s, get) for s in spec["seq"]]
        return tuple(items) if spec["tuple"] else items
    return spec["value"]


def dumps(description: dict) -> str:
    return json.dumps(description, sort_keys=True, separators=(",", ":"))
