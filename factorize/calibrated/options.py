"""How a calibrated compression runs, beyond its Policy: one small dataclass, parsed from keywords in one place.

:class:`CalibrationOptions` holds everything :class:`factorize.calibrated.search.Calibration`,
:func:`~factorize.calibrated.search.compress_calibrated` and :func:`~factorize.calibrated.search.search_drift` need
besides the model, the batches and the :class:`~factorize.plan.policy.Policy`: the activation-aware method and its
numerical knobs, sensitivity measurement, sequential refitting, the drift search, and how to run (precision,
threads, progress). :func:`calibrated_setup` turns the keywords of those functions into a Policy plus options.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from typing import Any

from factorize.calibrated.aware import DEFAULT_ALPHA, REFIT_RIDGE, AwareFit
from factorize.choices import (
    AWARE_METHODS,
    DEFAULT_SENSITIVITY,
    DRIFT_METRICS,
    SENSITIVITY_MODES,
    calibrated_methods,
)
from factorize.errors import FactorizeError
from factorize.execution import Execution
from factorize.plan.policy import POLICY_KEYWORDS, Policy, resolve_policy

SOLVERS = ("auto", "exact", "gram", "randomized")
DEFAULT_BUDGETS = (0.05, 0.95)  # drift search range: fractions of the sites' parameters (or MACs)
DEFAULT_TOLERANCE = 0.01  # stop bisecting when the bracket is this narrow
LEGACY_NAMES = {"metric": "drift_metric"}  # the drift functions' own name for drift_metric


@dataclass(frozen=True)
class CalibrationOptions:
    """Options of the calibrated path (see :class:`~factorize.calibrated.search.Calibration` for each one).

    ``aware_method`` / ``solver`` left at None follow the Policy's ``method``: ``"whiten"``/``"scale"`` choose the
    activation-aware method, ``"exact"``/``"gram"``/``"randomized"`` the solver; otherwise whitening with the
    Gram solver.
    """

    aware_method: str | None = None  # "whiten" (default) or "scale"
    solver: str | None = None  # "auto", "exact", "gram" (default) or "randomized"
    alpha: float = DEFAULT_ALPHA
    center: bool | str = "auto"
    ridge: float | None = None
    precision: str | None = None
    sensitivity: bool | str | None = None  # None: the default ("gradients" with whitening); True (= "both"),
    # "probes", "gradients", "both"; False or "none": each layer's own relative error (no output weighting)
    sensitivity_batches: Iterable[Any] | None = None
    fractions: tuple[float, ...] | str = "auto"
    projections: int = 2
    output_fn: Callable | None = None
    per_site: bool = False
    sequential: bool | str = "auto"  # "auto": sequential for rank-only whitened plans, else per layer (see
    # sequential_for); True: always (refused where it cannot run); False: per-layer factors with bias correction
    refit: bool = True
    refit_ridge: float = REFIT_RIDGE
    max_drift: float | None = None
    drift_metric: str = "relative_l2"
    budgets: tuple[float, float] = DEFAULT_BUDGETS
    tolerance: float = DEFAULT_TOLERANCE
    example: Any = None  # one batch to count MACs on (cost="macs"); default: the first calibration batch
    workers: int = 1  # decompose this many layers at once (threads)
    progress: bool = False

    def __post_init__(self) -> None:
        if self.aware_method is not None and self.aware_method not in AWARE_METHODS:
            raise FactorizeError(f"unknown activation-aware method {self.aware_method!r}",
                                 fix=f"use one of {', '.join(AWARE_METHODS)}")
        if self.solver is not None and self.solver not in SOLVERS:
            raise FactorizeError(f"unknown solver {self.solver!r}", fix=f"use one of {', '.join(SOLVERS)}")
        if self.drift_metric not in DRIFT_METRICS:
            raise FactorizeError(f"unknown drift metric {self.drift_metric!r}",
                                 fix=f"use one of {', '.join(DRIFT_METRICS)}")
        if not (isinstance(self.sequential, bool) or self.sequential == "auto"):
            raise FactorizeError(f"sequential must be True, False or 'auto', got {self.sequential!r}",
                                 fix="sequential='auto' (the default), True or False")
        sensitivity_mode(self.sensitivity)
        self.execution()  # precision, workers: checked here, as an Execution checks them

    def execution(self, seed: int = 0) -> Execution:
        """How the calibrated run is carried out (precision, workers, progress), with the Policy's ``seed``: the
        one object handed to the solvers."""
        return Execution(precision=self.precision, workers=self.workers, seed=seed, progress=self.progress)

    def fit(self, method: str, solver: str) -> AwareFit:
        """How each layer is fitted (:class:`~factorize.calibrated.aware.AwareFit`), for the activation-aware
        ``method`` and ``solver`` of :meth:`methods`."""
        return AwareFit(method=method, alpha=self.alpha, center=self.center, ridge=self.ridge,
                        refit_ridge=self.refit_ridge, solver=solver)

    @classmethod
    def from_keywords(cls, **keywords: Any) -> CalibrationOptions:
        """Options from keywords named like the fields (``metric`` is accepted for ``drift_metric``)."""
        kw = {LEGACY_NAMES.get(k, k): v for k, v in keywords.items()}
        names = [f.name for f in dataclasses.fields(cls)]
        unknown = [k for k in keywords if LEGACY_NAMES.get(k, k) not in names]
        if unknown:
            raise FactorizeError(f"unknown keyword{'s' if len(unknown) > 1 else ''}: {', '.join(unknown)}",
                                 fix="accepted: " + ", ".join((*POLICY_KEYWORDS, *names)))
        return cls(**kw)

    def methods(self, policy: Policy | None) -> tuple[str, str]:
        """(activation-aware method, solver) for this run, from these options and the policy's ``method``."""
        method = policy.method if policy is not None else "auto"
        if self.aware_method is not None and method in AWARE_METHODS and method != self.aware_method:
            raise FactorizeError(f"method={method!r} and aware_method={self.aware_method!r} disagree",
                                 fix="give the activation-aware method once")
        aware, solver = calibrated_methods(method, self.aware_method)  # the one mapping, shared with the CLI's sweep
        return aware, self.solver or solver


def sensitivity_mode(sensitivity: bool | str | None, aware_method: str = "whiten") -> str | None:
    """None, or the sensitivity measurement asked for ("probes", "gradients" or "both").

    None (not asked) gives the default, :data:`~factorize.choices.DEFAULT_SENSITIVITY`, whenever the factors
    are whitened: output directions weighted by the final output's Gauss-Newton matrix, gathered in one forward
    and two backward passes per batch, whatever the depth. It beat uniform-rank whitening and the relative
    allocation on every row of ``benchmarks/bench_default.py`` (two language models, an encoder, a CNN).
    """
    if sensitivity is None:
        return DEFAULT_SENSITIVITY if aware_method == "whiten" else None
    if sensitivity is True:
        return "both"
    if sensitivity is False or sensitivity == "none":
        return None
    if sensitivity not in SENSITIVITY_MODES:
        raise FactorizeError(f"unknown sensitivity mode {sensitivity!r}",
                             fix="use True (= 'both'), 'probes', 'gradients', 'both', or False / 'none'")
    return sensitivity


def calibrated_setup(policy: Policy | None, options: CalibrationOptions | None, keywords: Mapping[str, Any], *,
                     search: bool = False) -> tuple[Policy, CalibrationOptions]:
    """The Policy and options of a calibrated call, from a ready Policy / options or from keywords.

    Policy keywords (:data:`~factorize.plan.policy.POLICY_KEYWORDS`) build the Policy, the others the options;
    giving an object and keywords for it is an error. With ``max_drift`` (or ``search``) the drift search picks
    the budget, so the keywords must not set a rank rule, and a given Policy must have ``budget=`` (its value is
    replaced by each budget the search tries).
    """
    policy_kw = {k: v for k, v in keywords.items() if k in POLICY_KEYWORDS}
    rest = {k: v for k, v in keywords.items() if k not in POLICY_KEYWORDS}
    if options is not None and rest:
        raise FactorizeError("CalibrationOptions and option keywords were both given", [f"{k}=" for k in rest],
                             fix="put them into the options (dataclasses.replace(options, ...)) or pass keywords only")
    options = options if options is not None else CalibrationOptions.from_keywords(**rest)
    if not (search or options.max_drift is not None):
        return resolve_policy(policy, policy_kw), options
    if policy is not None and policy.budget is None:
        raise FactorizeError("max_drift= chooses the budget itself; the Policy given sets another rank rule",
                             fix="give a Policy with budget= (the search replaces its value), or drop max_drift=")
    return resolve_policy(policy, policy_kw, budget=1.0), options  # the search replaces the budget


def refuse_with_calibration(*, spectra: bool = False, speed_check: bool = False, cache: bool = False,
                            flags: bool = False) -> None:
    """Refuse the run options the calibrated path cannot honour, never dropping them silently: given spectra,
    the speed check and the spectrum cache. The one check behind ``compress`` and the command line (``flags``:
    name them as command-line flags, ``--speed-check``, rather than keywords, ``speed_check=``)."""
    def name(key: str) -> str:
        return "--" + key.replace("_", "-") if flags else f"{key}="

    calibration = "--calibration" if flags else "calibration"
    given = [name(k) for k, on in (("spectra", spectra), ("speed_check", speed_check), ("cache", cache)) if on]
    if spectra or speed_check:
        raise FactorizeError(f"{', '.join(given)} cannot be combined with {calibration} yet",
                             fix=f"compress without {calibration} to use them, or drop them")
    if cache:
        raise FactorizeError(
            f"{name('cache')} cannot be combined with {calibration}: the cache keys spectra by weight content only, "
            "while calibrated spectra also depend on the calibration inputs, so a cached one could belong to other "
            "inputs",
            fix=f"drop {name('cache')} (the calibrated spectra are kept on the result: use Calibration to try many "
                f"budgets), or compress without {calibration} to use the cache")
