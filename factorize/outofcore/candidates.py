"""Which tensors of a bare safetensors checkpoint are taken as linear-layer weights, and their spectra.

Every 2-D floating tensor named ``<module>.weight`` of shape (out, in) is a candidate, with ``<module>.bias`` as
its bias when that is a vector of ``out`` elements. Include/exclude patterns match the module name or the tensor
name. What is passed over is returned with the reason, so a scan or a shrink can say why a matrix was copied.
"""

from __future__ import annotations

import fnmatch
import os
from collections.abc import Iterable
from dataclasses import dataclass

import torch
from tqdm.auto import tqdm

from factorize.checkpoints.files import Checkpoint, open_checkpoint
from factorize.errors import FactorizeError
from factorize.model.sites import Site
from factorize.spectra.decompose import Spectrum, decompose, values_only
from factorize.storage import Header, TensorInfo, read_tensor

FLOAT_DTYPES = ("F64", "F32", "F16", "BF16")


@dataclass
class Candidate:
    """A tensor treated as a linear layer's weight (and its bias, if any), with the files holding them."""

    module: str
    weight: TensorInfo
    weight_file: Header
    bias: TensorInfo | None
    bias_file: Header | None
    kind: str = "linear"  # or "transposed": the weight is stored (in, out) (GPT-2's Conv1D; block by block only)

    @property
    def site(self) -> Site:
        m, n = self.weight.shape[::-1] if self.kind == "transposed" else self.weight.shape
        return Site(name=self.module, kind=self.kind, shape=(m, n), params=m * n, has_bias=self.bias is not None,
                    dtype=str(self.weight.torch_dtype).removeprefix("torch."))

    def read_weight(self) -> torch.Tensor:
        """The weight as stored ((out, in) for a linear), in its stored dtype, read through a short-lived memory
        map."""
        return read_tensor(self.weight_file.path, self.weight.name)

    def read_matrix(self) -> torch.Tensor:
        """The weight as an (out, in) matrix (a transposed view for a transposed projection)."""
        w = self.read_weight()
        return w.t() if self.kind == "transposed" else w

    def read_bias(self) -> torch.Tensor | None:
        """The bias (out,), or None."""
        return read_tensor(self.bias_file.path, self.bias.name) if self.bias is not None else None


def _as_list(value: str | Iterable[str] | None) -> list[str] | None:
    if value is None:
        return None
    return [value] if isinstance(value, str) else list(value)


def _matches(names: tuple[str, str], patterns: list[str] | None) -> bool:
    return any(fnmatch.fnmatchcase(n, p) for p in patterns or () for n in names)


def select(ckpt: Checkpoint, include=None, exclude=None) -> tuple[list[Candidate], dict[str, str]]:
    """The tensors to factor, and the 2-D floating tensors passed over with the reason.

    A pattern matches either the module name (``encoder.fc1``) or the tensor name (``encoder.fc1.weight``).
    Default: every 2-D floating tensor named ``<module>.weight``.
    """
    inc, exc = _as_list(include), _as_list(exclude)
    where = ckpt.locate()
    chosen: list[Candidate] = []
    passed: dict[str, str] = {}
    for name, h in where.items():
        info = h.tensors[name]
        if len(info.shape) != 2 or info.dtype not in FLOAT_DTYPES:
            continue
        module = name[: -len(".weight")] if name.endswith(".weight") else None
        names = (module or name, name)
        if inc is not None and not _matches(names, inc):
            continue
        if _matches(names, exc):
            passed[name] = "excluded by pattern"
            continue
        if module is None:
            passed[name] = "not named <module>.weight, so there is no layer to rewrite; copied"
            continue
        if min(info.shape) == 0:
            passed[name] = f"shape {list(info.shape)} has no element to factor; copied"
            continue
        bias_name = module + ".bias"
        bias = where[bias_name].tensors[bias_name] if bias_name in where else None
        if bias is not None and bias.shape != (info.shape[0],):
            passed[name] = (f"{bias_name} has shape {list(bias.shape)}, not ({info.shape[0]},): not a linear layer; "
                            "copied")
            continue
        if any(f"{module}.{part}.weight" in where for part in ("first", "second")):
            passed[name] = "the checkpoint already holds factored keys for this module; copied"
            continue
        chosen.append(Candidate(module, info, h, bias, where[bias_name] if bias is not None else None))
    return chosen, passed


def checkpoint_spectra(
    src: str | os.PathLike,
    *,
    include: str | Iterable[str] | None = None,
    exclude: str | Iterable[str] | None = None,
    method: str = "exact",
    seed: int = 0,
    progress: bool = False,
) -> tuple[list[Site], dict[str, Spectrum], dict[str, str]]:
    """The spectra of a checkpoint's linear-layer weights (as :func:`select` chooses them), one tensor at a time.

    What a weights-only scan or sweep needs: the sites, their spectra (for :func:`factorize.plan.ranks.choose_ranks`
    at any policy) and the tensors passed over with the reason. Raises when no tensor is selected. With
    ``method="auto"`` (the sweep's default) the spectra hold every singular value but no vectors
    (:func:`factorize.spectra.decompose.values_only`): planning needs nothing more.
    """
    chosen, passed = select(open_checkpoint(src), include, exclude)
    if not chosen:
        raise FactorizeError(f"{src}: no 2-D tensor named <module>.weight matches the patterns",
                             [f"{k}: {v}" for k, v in passed.items()],
                             fix="check the include/exclude patterns against the tensor names")

    def one(c: Candidate) -> Spectrum:
        W = c.read_weight()  # (out, in)
        if method == "auto":  # as a budget in compress(): every singular value, no vectors (all a plan needs)
            return values_only(W, name=c.module)
        return decompose(W, name=c.module, method=method, seed=seed)

    spectra = {c.module: one(c) for c in tqdm(chosen, desc="decompose", unit="layer", disable=not progress,
                                                leave=False)}
    return [c.site for c in chosen], spectra, passed
