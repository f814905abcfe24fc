"""factorize: shrink trained PyTorch models by low-rank factorization of their dense layers.

Typical use::

    import factorize
    result = factorize.compress(model, budget=0.5)
    result.model   # compressed copy
    result.plan    # JSON-serialisable plan

The names below are loaded on first use (PEP 562), so ``import factorize`` -- and with it the command line's
``--help`` and usage errors -- does not import torch until something that needs it is touched.
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING

from factorize._version import __version__

_EXPORTS = {  # public name -> the module that defines it
    "CalibratedResult": "factorize.calibrated.search",
    "Calibration": "factorize.calibrated.search",
    "CalibrationOptions": "factorize.calibrated.options",
    "CompressResult": "factorize.rewrite.apply",
    "Report": "factorize.measure.report",
    "DriftLimitExceeded": "factorize.errors",
    "DriftTargetUnreachable": "factorize.calibrated.search",
    "Exported": "factorize.checkpoints.export",
    "Factored": "factorize.rewrite.layers",
    "HealResult": "factorize.training.heal",
    "FactorizeError": "factorize.errors",
    "Override": "factorize.plan.policy",
    "Policy": "factorize.plan.policy",
    "ProgressiveSchedule": "factorize.training.loop",
    "Site": "factorize.model.sites",
    "Spectrum": "factorize.spectra.decompose",
    "SpectrumCache": "factorize.spectra.cache",
    "WalkResult": "factorize.model.sites",
    "apply_plan": "factorize.rewrite.apply",
    "check_directory": "factorize.checkpoints.directories",
    "choose_ranks": "factorize.plan.ranks",
    "compare_alternatives": "factorize.alternatives",
    "compress": "factorize.pipeline",
    "compress_in_training": "factorize.training.loop",
    "count_bytes": "factorize.model.count",
    "count_parameters": "factorize.model.count",
    "decompose": "factorize.spectra.decompose",
    "decompose_sites": "factorize.spectra.sites",
    "evaluate": "factorize.measure.evaluate",
    "export_onnx": "factorize.checkpoints.export",
    "export_program": "factorize.checkpoints.export",
    "factored_layers": "factorize.rewrite.layers",
    "heal": "factorize.training.heal",
    "integer_kernels": "factorize.rewrite.forms",
    "is_factored": "factorize.rewrite.layers",
    "load": "factorize.checkpoints.files",
    "load_directory": "factorize.checkpoints.directories",
    "load_recipe": "factorize.plan.recipe",
    "merge": "factorize.rewrite.apply",
    "merge_in_training": "factorize.training.loop",
    "output_drift": "factorize.measure.drift",
    "plan_ranks": "factorize.plan.ranks",
    "plan_summary": "factorize.plan.ranks",
    "read_plan": "factorize.checkpoints.files",
    "refactor": "factorize.training.loop",
    "run_model": "factorize.model.feed",
    "search_drift": "factorize.calibrated.search",
    "shrink_blockwise": "factorize.outofcore.blockwise",
    "shrink_checkpoint": "factorize.outofcore.weights_only",
    "save": "factorize.checkpoints.files",
    "save_directory": "factorize.checkpoints.directories",
    "to_dense": "factorize.rewrite.layers",
    "validate_plan": "factorize.rewrite.apply",
    "walk": "factorize.model.sites",
}

# What README.md, docs/*.md and examples/ teach as ``factorize.<name>`` (tests/test_public_api.py checks both
# directions).
# Every other name of ``_EXPORTS`` stays importable from here for code written against earlier versions, and lives
# in its sub-package (``factorize.model.count.count_parameters``, ``factorize.calibrated.options.CalibrationOptions``,
# ...); ``CalibrationOptions`` is not taught at the top: ``compress(..., calibration=...)`` takes its keywords.
__all__ = [
    "Calibration",
    "CompressResult",
    "DriftLimitExceeded",
    "DriftTargetUnreachable",
    "Exported",
    "FactorizeError",
    "Policy",
    "ProgressiveSchedule",
    "Spectrum",
    "__version__",
    "apply_plan",
    "check_directory",
    "choose_ranks",
    "compare_alternatives",
    "compress",
    "compress_in_training",
    "decompose",
    "evaluate",
    "export_onnx",
    "export_program",
    "heal",
    "integer_kernels",
    "load",
    "load_directory",
    "merge",
    "merge_in_training",
    "plan_summary",
    "read_plan",
    "refactor",
    "save",
    "save_directory",
    "search_drift",
    "shrink_blockwise",
    "shrink_checkpoint",
    "walk",
]


def __getattr__(name: str):
    module = _EXPORTS.get(name)
    if module is None:
        raise AttributeError(f"module 'factorize' has no attribute {name!r}")
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value  # later look-ups skip this function
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))


if TYPE_CHECKING:  # for type checkers and editors: every name of _EXPORTS, from the module it names there;
    # "X as X" marks a name kept for compatibility as re-exported (it is not in __all__)
    from factorize.alternatives import compare_alternatives
    from factorize.calibrated.options import CalibrationOptions as CalibrationOptions
    from factorize.calibrated.search import CalibratedResult as CalibratedResult
    from factorize.calibrated.search import (
        Calibration,
        DriftTargetUnreachable,
        search_drift,
    )
    from factorize.checkpoints.directories import (
        check_directory,
        load_directory,
        save_directory,
    )
    from factorize.checkpoints.export import Exported, export_onnx, export_program
    from factorize.checkpoints.files import load, read_plan, save
    from factorize.errors import DriftLimitExceeded, FactorizeError
    from factorize.measure.drift import output_drift as output_drift
    from factorize.measure.evaluate import evaluate
    from factorize.measure.report import Report as Report
    from factorize.model.count import count_bytes as count_bytes
    from factorize.model.count import count_parameters as count_parameters
    from factorize.model.feed import run_model as run_model
    from factorize.model.sites import Site as Site
    from factorize.model.sites import WalkResult as WalkResult
    from factorize.model.sites import walk
    from factorize.outofcore.blockwise import shrink_blockwise
    from factorize.outofcore.weights_only import shrink_checkpoint
    from factorize.pipeline import compress
    from factorize.plan.policy import Override as Override
    from factorize.plan.policy import Policy
    from factorize.plan.ranks import choose_ranks, plan_summary
    from factorize.plan.ranks import plan_ranks as plan_ranks
    from factorize.plan.recipe import load_recipe as load_recipe
    from factorize.rewrite.apply import CompressResult, apply_plan, merge
    from factorize.rewrite.apply import validate_plan as validate_plan
    from factorize.rewrite.forms import integer_kernels
    from factorize.rewrite.layers import Factored as Factored
    from factorize.rewrite.layers import factored_layers as factored_layers
    from factorize.rewrite.layers import is_factored as is_factored
    from factorize.rewrite.layers import to_dense as to_dense
    from factorize.spectra.cache import SpectrumCache as SpectrumCache
    from factorize.spectra.decompose import Spectrum, decompose
    from factorize.spectra.sites import decompose_sites as decompose_sites
    from factorize.training.heal import HealResult as HealResult
    from factorize.training.heal import heal
    from factorize.training.loop import (
        ProgressiveSchedule,
        compress_in_training,
        merge_in_training,
        refactor,
    )
