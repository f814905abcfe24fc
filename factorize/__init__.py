"""factorize: shrink trained PyTorch models by low-rank factorization of their dense layers.

Typical use::

    import factorize
    result = factorize.compress(model, budget=0.5)
    result.model   # compressed copy
    result.plan    # JSON-serialisable plan
"""

from factorize.api import CompressResult, apply_plan, compress, decompose_sites, merge, validate_plan
from factorize.cache import SpectrumCache
from factorize.checkpoint import shrink_checkpoint
from factorize.count import count_bytes, count_parameters
from factorize.decompose import Spectrum, decompose
from factorize.errors import DriftLimitExceeded, FactorizeError
from factorize.evaluate import evaluate, output_drift, run_model
from factorize.heal import HealResult, heal
from factorize.io import load, read_plan, save
from factorize.layers import Factored, factored_layers, is_factored, to_dense
from factorize.ranks import Override, Policy, choose_ranks, plan_ranks, plan_summary
from factorize.recipe import load_recipe
from factorize.report import Report
from factorize.search import CalibratedResult, Calibration, DriftTargetUnreachable, search_drift
from factorize.training import ProgressiveSchedule, compress_in_training, merge_in_training, refactor
from factorize.walk import Site, WalkResult, walk

__version__ = "0.1.0"

__all__ = [
    "CalibratedResult",
    "Calibration",
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
