"""What the out-of-core shrinks return: frozen results, each with one dict form and one report.

:class:`CheckpointShrink` (the weights-only streaming shrink) and :class:`BlockwiseShrink` (the block-by-block
calibrated shrink) hold the plan, one row per linear weight, the files written and the sizes; ``to_dict()`` is the
plain form (JSON-ready), ``report(source)`` the :class:`~factorize.measure.report.Report` the terminal renders and
``--json`` prints. Drift is not measured by either (there is no model in memory to run), and the reports say so.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from factorize.measure.report import LayerReport, Report
from factorize.plan.entries import is_factored_entry
from factorize.storage import human_bytes

WEIGHTS_ONLY_NOTE = ("weights-only mode: there is no architecture to run, so output drift was not measured; load the "
                     "output into your model with factorize.load(model, path) and run 'factorize compare' on real "
                     "inputs")
MEMORY_KEYS = ("peak_rss_bytes", "block_bytes", "activation_bytes", "bound_bytes", "bound_met")


def no_drift_caution(why: str, compare: str) -> str:
    """The caution of a report that measured no drift: says so (``why``), how to measure it (``compare``: the
    command), and still that drift on samples is no guarantee and safety-relevant uses need re-validation (the
    caution :data:`factorize.measure.report.CAUTION` gives where drift is measured)."""
    return (f"No output drift was measured here ({why}): the weight errors above say how close each layer is, not "
            f"how the model behaves. Measure drift on inputs of your own before using the result: {compare}. Even "
            "then, drift on sample inputs is no guarantee of how the compressed model behaves on other inputs; where "
            "the model is used in a safety-relevant setting, validate the compressed model again under the rules "
            "that govern that setting before deploying it.")


def layer_reports(tensors: Mapping[str, Mapping]) -> list[LayerReport]:
    """One :class:`LayerReport` per written linear weight: sizes and the predicted (Eckart-Young) and measured
    weight errors only, since there is no architecture to run."""
    layers = []
    for row in tensors.values():
        m, n = row["shape"]
        rank = row["rank"] if is_factored_entry(row) else None
        correction = row.get("correction_rank")
        after = m * n if rank is None else rank * (m + n)
        layers.append(LayerReport(name=row["module"], kind="linear", shape=(m, n), rank=rank, params=m * n,
                                  params_after=after + (correction or 0) * (m + n),
                                  weight_error=row.get("relative_error", 0.0 if rank is None else None),
                                  predicted_error=row.get("predicted_error"), form=row.get("action", ""),
                                  precision=row.get("precision"), bytes=row.get("bytes"),
                                  bytes_after=row.get("bytes_after"), correction_rank=correction))
    return layers


def engine_note(where: Mapping | None) -> list[str]:
    """Where the tasks ran, for a report (nothing when they ran in this process)."""
    where = where or {}
    if where.get("engine", "local") == "local":
        return []
    return [f"ran as tasks on {where['engine']} at {where['address']} with {where['workers']} worker(s), "
            f"{where['threads_per_task']} torch thread(s) per task"]


@dataclass(frozen=True)
class CheckpointShrink:
    """The result of :func:`factorize.outofcore.weights_only.shrink_checkpoint`.

    ``tensors`` maps each selected weight to ``{module, shape, action, rank, predicted_error, relative_error}``
    (``relative_error`` measured on the stored factors: ||W - BA||_F / ||W||_F); ``passed_over`` the 2-D tensors
    not factored, with the reason; ``engine`` says where the tasks ran (:meth:`~factorize.cluster.Engine.describe`);
    ``redone`` lists the tensors whose task ran again after a worker died (or after an earlier run stopped part
    way); ``cache`` the spectrum cache's counts (None without a cache).
    """

    plan: dict
    tensors: dict[str, dict]
    passed_over: dict[str, str]
    files: list[str]
    bytes_before: int
    bytes_after: int
    params_before: int
    params_after: int
    passes: int
    cache: dict | None
    engine: dict
    redone: list[str]

    def to_dict(self) -> dict[str, Any]:
        """The plain form (JSON-ready), keys in field order."""
        return {f.name: getattr(self, f.name) for f in dataclasses.fields(self)}

    def report(self, source: str) -> Report:
        """The :class:`~factorize.measure.report.Report` of this shrink of ``source`` (sizes, weight errors)."""
        notes = [WEIGHTS_ONLY_NOTE, *engine_note(self.engine)]
        if self.redone:
            notes.append("redone after a worker was lost or an earlier run stopped part way: " + ", ".join(self.redone))
        out = self.files[-1] if self.files else "OUTPUT"
        compare = (f"factorize compare --model YOUR_MODEL --against {out} --inputs FILE (with --weights {source} "
                   "when --model is your code)")
        return Report(title="factorize shrink (weights-only)", model=source, params_before=self.params_before,
                      params_after=self.params_after, bytes_before=self.bytes_before, bytes_after=self.bytes_after,
                      layers=layer_reports(self.tensors), policy=self.plan["policy"], notes=notes,
                      caution=no_drift_caution("weights-only mode has no architecture to run", compare))


@dataclass(frozen=True)
class BlockwiseShrink:
    """The result of :func:`factorize.outofcore.blockwise.shrink_blockwise`.

    ``peak_rss_bytes`` is this process's peak resident size during the call (from the start of the call when
    ``peak_reset``, else over the process's life); tasks on other machines are not in it. ``bound_bytes`` is
    2 blocks + activations + 1 GB and ``bound_met`` whether the peak stayed within it.
    """

    plan: dict
    tensors: dict[str, dict]
    files: list[str]
    output: str
    params_before: int
    params_after: int
    kept_fraction: float
    bytes_before: int
    bytes_after: int
    blocks: int
    sequences: int
    tokens: int
    slices: int
    threads: int
    engine: dict
    seconds: float
    peak_rss_bytes: int
    peak_reset: bool
    block_bytes: int
    activation_bytes: int
    bound_bytes: int
    bound_met: bool

    def to_dict(self) -> dict[str, Any]:
        """The plain form (JSON-ready), keys in field order."""
        return {f.name: getattr(self, f.name) for f in dataclasses.fields(self)}

    def memory(self) -> dict[str, Any]:
        """The measured peak and the bound it is held to."""
        return {k: getattr(self, k) for k in MEMORY_KEYS}

    def memory_note(self) -> str:
        """One line on memory for reports: the measured peak against the bound."""
        return (f"block by block: peak resident memory {human_bytes(self.peak_rss_bytes)}; one block "
                f"{human_bytes(self.block_bytes)} (float32), activations {human_bytes(self.activation_bytes)}; "
                f"bound 2 blocks + activations + 1 GB = {human_bytes(self.bound_bytes)}: "
                f"{'met' if self.bound_met else 'missed'}")

    def report(self, source: str, calibration: str = "the calibration inputs") -> Report:
        """The :class:`~factorize.measure.report.Report` of this shrink of ``source``, calibrated on
        ``calibration`` (a description of the inputs)."""
        how = self.plan["calibration"]
        notes = [(f"activation-aware factors ({how['method']}) fitted block by block to {calibration}"
                  + ("; each block refitted to the outputs of the compressed blocks upstream (sequential)"
                     if how.get("sequential") else "")), self.memory_note(),
                 ("output drift was not measured (the whole model is never in memory here): load the output with "
                  f"factorize.load_directory('{self.output}') and run 'factorize compare' on real inputs")]
        compare = (f"on a machine that holds the model, factorize compare --model {source} --against {self.output} "
                   "--inputs FILE")
        return Report(title="factorize shrink (block by block)", model=source, params_before=self.params_before,
                      params_after=self.params_after, bytes_before=self.bytes_before, bytes_after=self.bytes_after,
                      layers=layer_reports(self.tensors), policy=self.plan["policy"], notes=notes,
                      caution=no_drift_caution("the whole model is never in memory in a block-by-block shrink",
                                               compare))
