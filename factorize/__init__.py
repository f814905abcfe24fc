"""factorize: shrink trained PyTorch models by low-rank factorization of their dense layers.

Typical use::

    import factorize
    result = factorize.compress(model, budget=0.5)
    result.model   # compressed copy
    result.plan    # JSON-serialisable plan
"""

from factorize._version import __version__
from factorize.calibrated.options import CalibrationOptions
from factorize.calibrated.search import (
    CalibratedResult,
    Calibration,
    DriftTargetUnreachable,
    search_drift,
)
from factorize.checkpoints.files import load, read_plan, save
from factorize.checkpoints.stream import shrink_checkpoint
from factorize.errors import DriftLimitExceeded, FactorizeError
from factorize.measure.drift import output_drift
from factorize.measure.evaluate import evaluate
from factorize.measure.report import Report
from factorize.model.count import count_bytes, count_parameters
from factorize.model.feed import run_model
from factorize.model.sites import Site, WalkResult, walk
from factorize.pipeline import compress
from factorize.plan.ranks import (
    Override,
    Policy,
    choose_ranks,
    plan_ranks,
    plan_summary,
)
from factorize.plan.recipe import load_recipe
from factorize.rewrite.apply import CompressResult, apply_plan, merge, validate_plan
from factorize.rewrite.layers import Factored, factored_layers, is_factored, to_dense
from factorize.spectra.cache import SpectrumCache
from factorize.spectra.decompose import Spectrum, decompose
from factorize.spectra.sites import decompose_sites
from factorize.training.heal import HealResult, heal
from factorize.training.loop import (
    ProgressiveSchedule,
    compress_in_training,
    merge_in_training,
    refactor,
)

__all__ = [
    "__version__",
    "CalibratedResult",
    "Calibration",
    "CalibrationOptions",
    "CompressResult",
    "Report",
    "DriftLimitExceeded",
    "DriftTargetUnreachable",
    "Factored",
    "HealResult",
    "FactorizeError",
    "Override",
    "Policy",
    "ProgressiveSchedule",
    "Site",
    "Spectrum",
    "SpectrumCache",
    "WalkResult",
    "apply_plan",
    "choose_ranks",
    "compress",
    "compress_in_training",
    "count_bytes",
    "count_parameters",
    "decompose",
    "decompose_sites",
    "evaluate",
    "factored_layers",
    "heal",
    "is_factored",
    "load",
    "load_recipe",
    "merge",
    "merge_in_training",
    "output_drift",
    "plan_ranks",
    "plan_summary",
    "read_plan",
    "refactor",
    "run_model",
    "search_drift",
    "shrink_checkpoint",
    "save",
    "to_dense",
    "validate_plan",
    "walk",
]
