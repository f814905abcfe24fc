"""The named choices of the library's options, defined once, with no heavy import.

The command line offers these values as ``choices=`` at start-up, before torch is imported, and the library
validates against the same tuples, so the two can never disagree (``factorize --help`` stays fast because this
module imports nothing).
"""

from __future__ import annotations

METHODS = ("auto", "exact", "gram", "randomized")  # decomposition of a weight matrix (spectra.decompose)
DEFAULT_METHOD = "auto"  # what factorize.compress decomposes with when no method is named
AWARE_METHODS = ("whiten", "scale")  # activation-aware factors from calibration inputs (calibrated.aware)
SENSITIVITY_MODES = ("probes", "gradients", "both", "none")  # measured per-layer sensitivity (calibrated.search)
DEFAULT_SENSITIVITY = "gradients"  # with calibration and whitening: the best measured default (BENCHMARKS.md)
POOLINGS = ("mean", "cls", "last")  # one vector per sample from token states (measure.pooling)
# what a drift search (max_drift, --target-drift) keeps under the limit (calibrated.search.measure_drift): relative
# L2 over all outputs, 1 - mean cosine, or the tail: the 95th percentile of per-sample relative L2, 1 - the 5th
# percentile of per-sample cosine
DRIFT_METRICS = ("relative_l2", "cosine", "relative_l2_p95", "cosine_p5")
OUTPUT_KINDS = ("logits", "scores", "features", "embeddings")  # what a model's output holds (measure.drift)
HEAL_SCHEDULES = ("constant", "cosine")  # learning-rate schedule of healing (training.heal)
SOLVERS = ("exact", "gram", "randomized")  # the eigensolvers a calibrated decomposition can be asked for by name
DEFAULT_SOLVER = "gram"  # with calibration, what method "auto" (or an activation-aware method) decomposes with
COSTS = ("params", "macs", "bytes", "latency")  # what a budget counts (plan.policy)
# stored precisions of a weight or of factors (rounding.formats): floats, int8 with one scale per output row,
# 4-bit integers with one scale per group of 32, 64 or 128 inputs
PRECISIONS = ("float32", "bfloat16", "float16", "int8", "int4g32", "int4g64", "int4g128")


def calibrated_methods(method: str | None, aware_method: str | None = None) -> tuple[str, str]:
    """Split one ``method=`` value into (activation-aware method, solver) for a calibrated compression.

    ``method`` may name an activation-aware method (``"whiten"``, ``"scale"``) or a decomposition; ``"auto"``
    (the default; ``None`` means the default) and the aware names decompose with :data:`DEFAULT_SOLVER`. Every
    calibrated path (the ``compress`` call and the command line's sweep) goes through here, so the same options
    give the same plan.
    """
    method = DEFAULT_METHOD if method is None else method
    aware = aware_method or (method if method in AWARE_METHODS else "whiten")
    solver = method if method in SOLVERS else DEFAULT_SOLVER
    return aware, solver
