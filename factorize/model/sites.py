"""Walk a model and list the layers whose weight is a matrix we can factor ("sites").

Every site is seen through one matrix view, ``out x in`` (m x n), so the rest of the pipeline treats all kinds
alike:

=============  ===============================  ====================================================
kind           module                           matrix view (m x n)
=============  ===============================  ====================================================
linear         ``nn.Linear``                    ``weight`` (out_features x in_features)
conv1d/2d/3d   ``nn.Conv1d`` / ``2d`` / ``3d``     ``weight.reshape(out, in * prod(kernel))``, groups=1
conv_transpose ``nn.ConvTranspose1d`` / ``2d``  ``weight.reshape(in, out * prod(kernel)).T``, groups=1
 1d/2d                                           (out * prod(kernel) x in; see below)
embedding      ``nn.Embedding``                 ``weight.T`` (embedding_dim x num_embeddings)
transposed     leaf with a transposed weight    ``weight.T`` (see :func:`is_transposed_projection`)
=============  ===============================  ====================================================

A transposed convolution stores its weight as (in, out, *kernel) and scatters ``weight[i] * x[i, p]`` around
each input position p. Its matrix view is therefore the (out * prod(kernel)) x in matrix applied to the channel
vector of each input position: a rank-r factorisation of it is a 1x1 convolution from ``in`` to r channels (A)
followed by a transposed convolution from r channels (B), which reproduces the layer exactly at full rank.

Storing the m x n matrix costs mn numbers; rank-r factors cost r(m + n), so factoring saves only when
r < mn / (m + n) (common practice). ``break_even`` is floor(mn / (m + n)) -- no rank above it saves.
"""

from __future__ import annotations

import fnmatch
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field

import torch
from torch import nn

from factorize.errors import FactorizeError

CONV_KINDS = ("conv1d", "conv2d", "conv3d")
CONV_TRANSPOSE_KINDS = ("conv_transpose1d", "conv_transpose2d")
KINDS = ("linear", *CONV_KINDS, *CONV_TRANSPOSE_KINDS, "embedding", "transposed")


@dataclass(frozen=True)
class Site:
    """One factorizable layer."""

    name: str  # qualified module name, as in model.named_modules()
    kind: str  # one of KINDS
    shape: tuple[int, int]  # matrix view (out m, in n)
    params: int  # m * n numbers in the weight (bias not counted)
    has_bias: bool
    dtype: str  # weight dtype, e.g. "float32"
    tied_with: tuple[str, ...] = ()  # other qualified names sharing this weight tensor
    kernel: tuple[int, ...] = ()  # conv kernel size, () otherwise
    macs_per_sample: int | None = None  # multiply-accumulates per sample when measured (conv: x output positions)

    @property
    def break_even(self) -> int:
        """floor(mn / (m + n)) (common practice): factoring saves only when r < mn / (m + n), so no rank above
        this saves, and this one saves only when mn / (m + n) is not a whole number."""
        m, n = self.shape
        return (m * n) // (m + n)

    @property
    def max_rank(self) -> int:
        return min(self.shape)

    def factored_params(self, rank: int) -> int:
        """Numbers stored by rank-``rank`` factors: r(m + n) (common practice)."""
        m, n = self.shape
        return rank * (m + n)

    def saves_at(self, rank: int) -> bool:
        return self.factored_params(rank) < self.params

    def to_dict(self) -> dict:
        return {
            "name": self.name,
            "kind": self.kind,
            "shape": list(self.shape),
            "params": self.params,
            "break_even": self.break_even,
            "has_bias": self.has_bias,
            "dtype": self.dtype,
            "tied_with": list(self.tied_with),
            "kernel": list(self.kernel),
        }


@dataclass(frozen=True)
class Skipped:
    """A layer the walker saw but will not factor, with the reason."""

    name: str
    reason: str


@dataclass
class WalkResult:
    """What the walker found: factorizable sites (in module order) and layers skipped with a reason."""

    sites: list[Site] = field(default_factory=list)
    skipped: list[Skipped] = field(default_factory=list)

    def __iter__(self):
        return iter(self.sites)

    def __len__(self) -> int:
        return len(self.sites)

    def by_name(self) -> dict[str, Site]:
        return {s.name: s for s in self.sites}

    @property
    def tied(self) -> list[Site]:
        return [s for s in self.sites if s.tied_with]

    def require_sites(self, filtered: bool = False) -> WalkResult:
        """This result, or the one error every entry point gives when the walk found nothing to factor.

        ``filtered``: include/exclude patterns narrowed the walk (the message then says so)."""
        if self.sites:
            return self
        raise FactorizeError(
            "no factorizable layer found" + (" matching the include/exclude patterns" if filtered else ""),
            [f"{s.name}: {s.reason}" for s in self.skipped],
            fix="factorize handles nn.Linear, nn.Conv1d/2d/3d and nn.ConvTranspose1d/2d (groups=1), nn.Embedding "
            "and transposed projections; "
            "check the include/exclude globs against model.named_modules()",
        )


def is_transposed_projection(module: nn.Module) -> bool:
    """Duck-typing rule for projections that store their weight transposed (GPT-2's ``Conv1D`` and the like).

    A module counts when all of these hold, without importing the library that defines it:

    1. it is not a torch.nn layer we handle otherwise, and it has no child modules;
    2. its own parameters are exactly a 2-D ``weight`` of shape (in, out) and optionally a 1-D ``bias`` of
       length ``out``;
    3. on a probe input ``x`` of shape (2, in) its forward returns ``x @ weight + bias`` (to float tolerance).

    The probe (rule 3) is what makes the rule safe: a module that merely has a 2-D weight but computes
    something else is not treated as a projection.
    """
    if isinstance(module, (nn.Linear, nn.Embedding, nn.modules.conv._ConvNd)) or any(True for _ in module.children()):
        return False
    params = dict(module.named_parameters(recurse=False))
    weight = params.get("weight")
    if weight is None or weight.dim() != 2 or set(params) - {"weight", "bias"}:
        return False
    bias = params.get("bias")
    _, n_out = weight.shape
    if bias is not None and tuple(bias.shape) != (n_out,):
        return False
    return _probe_transposed(module, weight, bias)


def _probe_transposed(module: nn.Module, weight: torch.Tensor, bias: torch.Tensor | None) -> bool:
    gen = torch.Generator().manual_seed(0)
    x = torch.randn(2, weight.shape[0], generator=gen).to(device=weight.device, dtype=weight.dtype)
    try:
        with torch.no_grad():
            y = module(x)
    except Exception:  # noqa: BLE001 - any failure means "does not behave like a projection"
        return False
    if not isinstance(y, torch.Tensor) or tuple(y.shape) != (2, weight.shape[1]):
        return False
    with torch.no_grad():
        expected = x @ weight + (bias if bias is not None else 0)
    tol = 1e-2 if weight.dtype in (torch.float16, torch.bfloat16) else 1e-4
    return bool(torch.allclose(y.float(), expected.float(), rtol=tol, atol=tol * float(expected.abs().max() + 1)))


def _kind_of(module: nn.Module) -> tuple[str | None, str | None]:
    """(kind, None) for a factorizable module, (None, reason) for a dense layer we skip, (None, None) otherwise."""
    if getattr(type(module), "_factorize_factored", False):
        return None, None  # already factored (its two factor layers are walked as children)
    reason = _unsafe(module)
    if reason is not None:
        return None, reason
    weight = getattr(module, "weight", None)
    if isinstance(weight, torch.Tensor) and weight.dim() >= 2 and weight.numel() == 0:
        return None, f"weight of shape {tuple(weight.shape)} has a zero-size dimension: nothing to factor; left dense"
    if isinstance(module, nn.Linear):
        return "linear", None
    if isinstance(module, nn.modules.conv._ConvNd):
        return _conv_kind(module)
    if isinstance(module, nn.Embedding):
        if module.max_norm is not None:
            return None, "embedding with max_norm renormalises rows at lookup; left dense"
        return "embedding", None
    if isinstance(module, nn.EmbeddingBag):
        return None, "EmbeddingBag is not supported; left dense"
    if isinstance(module, nn.RNNBase):
        return None, (f"{type(module).__name__} weights (weight_ih/weight_hh) feed a fused recurrent kernel that "
                      "takes dense matrices; left dense")
    if isinstance(module, nn.MultiheadAttention):
        fused = "in_proj_weight" if module.in_proj_weight is not None else "q/k/v_proj_weight"
        return None, (f"MultiheadAttention passes {fused} to a fused attention kernel as dense matrices; left dense "
                      "(its out_proj is a site of its own)")
    if is_transposed_projection(module):
        return "transposed", None
    return None, None


_CONV_CLASSES = {nn.Conv1d: "conv1d", nn.Conv2d: "conv2d", nn.Conv3d: "conv3d",
                 nn.ConvTranspose1d: "conv_transpose1d", nn.ConvTranspose2d: "conv_transpose2d"}


def _conv_kind(module: nn.Module) -> tuple[str | None, str | None]:
    kind = next((k for cls, k in _CONV_CLASSES.items() if isinstance(module, cls)), None)
    if kind is None:
        return None, (f"{type(module).__name__} is not supported (Conv1d/2d/3d and ConvTranspose1d/2d are); "
                      "left dense")
    if module.groups != 1:
        return None, (f"grouped convolution (groups={module.groups}): its weight is {module.groups} independent "
                      "per-group blocks, not one matrix, and factorize builds no per-group structure; left dense")
    return kind, None


def _unsafe(module: nn.Module) -> str | None:
    """Why a layer of a kind we handle still cannot be factored safely, or None."""
    if not isinstance(module, (nn.Linear, nn.Embedding, *_CONV_CLASSES)):
        return None
    weight = module._parameters.get("weight")
    if "parametrizations" in module._modules or weight is None:
        return f"{type(module).__name__} computes its weight (a parametrization or a property); left dense"
    if not weight.is_floating_point():
        return f"{type(module).__name__} holds a {str(weight.dtype).removeprefix('torch.')} weight; left dense"
    return None


def matrix_of(module: nn.Module, kind: str) -> torch.Tensor:
    """The layer's weight as an (out m, in n) matrix view (no copy where the layout allows)."""
    w = module.weight
    if kind == "linear":
        return w  # (m, n)
    if kind in CONV_KINDS:
        return w.reshape(w.shape[0], -1)  # (out, in * prod(kernel))
    if kind in CONV_TRANSPOSE_KINDS:
        return w.reshape(w.shape[0], -1).t()  # stored (in, out, *kernel) -> (out * prod(kernel), in)
    if kind in ("embedding", "transposed"):
        return w.t()  # embedding: (dim, vocab); transposed: stored (in, out) -> (out, in)
    raise ValueError(f"unknown kind {kind!r}")


def _matches(name: str, patterns: Sequence[str] | None) -> bool:
    return any(fnmatch.fnmatchcase(name, p) for p in patterns or ())


def _shared_weights(model: nn.Module) -> dict[int, list[str]]:
    """Map id(weight tensor) -> every qualified module name that owns it (tied weights have several)."""
    owners: dict[int, list[str]] = {}
    for name, module in model.named_modules(remove_duplicate=False):
        w = module._parameters.get("weight") if hasattr(module, "_parameters") else None
        if w is not None:
            names = owners.setdefault(id(w), [])
            if name not in names:
                names.append(name)
    return owners


def _as_patterns(value: str | Iterable[str] | None, what: str) -> list[str] | None:
    if value is None:
        return None
    if isinstance(value, str):
        return [value]
    patterns = list(value)
    bad = [repr(p) for p in patterns if not isinstance(p, str)]
    if bad:
        raise FactorizeError(f"{what} patterns must be strings", bad,
                             fix=f"pass {what} as a glob string or a list of them")
    return patterns


def walk(
    model: nn.Module,
    *,
    include: str | Iterable[str] | None = None,
    exclude: str | Iterable[str] | None = None,
    allow_meta: bool = False,
) -> WalkResult:
    """Find every factorizable layer of ``model``.

    Args:
        model: any ``torch.nn.Module``; it is only read.
        include: glob pattern(s) on qualified module names (``fnmatch`` rules, e.g. ``"encoder.*.attention.*"``);
            when given, only matching layers become sites.
        exclude: glob pattern(s); matching layers are never sites.
        allow_meta: walk a skeleton whose parameters are on the meta device (names, kinds and shapes only; the
            out-of-core shrinks read the values from the checkpoint themselves). Otherwise such a model is an error.

    Returns:
        A :class:`WalkResult`. A weight shared by several modules (tied embedding and output head) gives one
        site per owner, each with ``tied_with`` naming the others; rank policies leave such sites dense unless
        asked otherwise, since factoring one owner would silently untie them.
    """
    if not isinstance(model, nn.Module):
        raise FactorizeError(
            f"expected a torch.nn.Module, got {type(model).__name__}",
            fix="pass the model object itself (for a checkpoint file, build the architecture and load it first)",
        )
    if not allow_meta:
        _refuse_meta(model)
    include_p = _as_patterns(include, "include")
    exclude_p = _as_patterns(exclude, "exclude")
    owners = _shared_weights(model)
    result = WalkResult()
    for name, module in model.named_modules():
        if not name:
            continue  # the root module cannot be swapped in place; wrap a bare layer in a container
        if include_p is not None and not _matches(name, include_p):
            continue
        if _matches(name, exclude_p):
            continue
        kind, reason = _kind_of(module)
        if kind is None:
            if reason is not None:
                result.skipped.append(Skipped(name, reason))
            continue
        result.sites.append(_make_site(name, module, kind, owners))
    result.skipped.extend(_uncovered(model, result, include_p, exclude_p))
    return result


def _refuse_meta(model: nn.Module) -> None:
    """Parameters on the meta device have shapes but no values: nothing can be measured or factored."""
    meta = [n for n, p in model.named_parameters() if p.is_meta]
    if meta:
        raise FactorizeError(
            f"{len(meta)} parameter(s) of the model are on the meta device (shapes only, no values)", meta[:20],
            fix="load real weights first: model.to_empty(device='cpu') then model.load_state_dict(...), or build "
            "the model without device='meta' (or an empty-weights context)")


def _uncovered(model: nn.Module, found: WalkResult, include_p, exclude_p) -> list[Skipped]:
    """A skip entry for every parameter with two or more dimensions that is neither the weight of a site nor held
    by a skipped layer (a bare Parameter a forward uses directly: position tables, class tokens, ``F.linear``)."""
    covered = {s.name for s in found.sites} | {s.name for s in found.skipped}
    seen: set[int] = set()
    for name in covered:
        module = get_module(model, name)
        if getattr(type(module), "_factorize_factored", False):
            continue
        seen.update(id(p) for p in module.parameters(recurse=False))
    out = []
    for mod_name, module in model.named_modules():
        if getattr(type(module), "_factorize_factored", False):
            continue  # factored: its weight is computed, its factors are children
        if (include_p is not None and not _matches(mod_name, include_p)) or _matches(mod_name, exclude_p):
            continue
        for p_name, p in module.named_parameters(recurse=False):
            if p.dim() < 2 or id(p) in seen:
                continue
            seen.add(id(p))
            owner = type(module).__name__
            out.append(Skipped(f"{mod_name}.{p_name}" if mod_name else p_name,
                               f"a {tuple(p.shape)} parameter that {owner} uses directly (not the weight of a layer "
                               "kind factorize handles); left dense"))
    return out


def _make_site(name: str, module: nn.Module, kind: str, owners: dict[int, list[str]]) -> Site:
    w = module.weight
    m, n = matrix_of(module, kind).shape
    kernel = tuple(module.kernel_size) if kind in CONV_KINDS + CONV_TRANSPOSE_KINDS else ()
    tied = tuple(o for o in owners.get(id(w), []) if o != name)
    bias = getattr(module, "bias", None)
    return Site(
        name=name,
        kind=kind,
        shape=(int(m), int(n)),
        params=int(m) * int(n),
        has_bias=isinstance(bias, torch.Tensor),
        dtype=str(w.dtype).removeprefix("torch."),
        tied_with=tied,
        kernel=kernel,
    )


def input_embedding_names(model: nn.Module) -> list[str]:
    """The qualified names of a transformers model's input embedding table (``model.get_input_embeddings()``)
    and of every module sharing its weight (a tied output head), in module order; [] for a model without
    ``get_input_embeddings`` (or one that raises, as transformers' base class does when a model defines none)."""
    get = getattr(model, "get_input_embeddings", None)
    if not callable(get):
        return []
    try:
        table = get()
    except (NotImplementedError, AttributeError, TypeError):
        return []
    weight = table._parameters.get("weight") if isinstance(table, nn.Module) else None
    if weight is None:
        return []
    return [name for name, module in model.named_modules() if name and module._parameters.get("weight") is weight]


def get_module(model: nn.Module, name: str) -> nn.Module:
    """The submodule at qualified ``name`` ("" is the model itself)."""
    return model.get_submodule(name) if name else model


def set_module(model: nn.Module, name: str, new: nn.Module) -> None:
    """Replace the submodule at qualified ``name`` (which must not be "")."""
    parent_name, _, attr = name.rpartition(".")
    parent = get_module(model, parent_name)
    setattr(parent, attr, new)
