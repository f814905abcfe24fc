"""The learning-rate schedules of :func:`factorize.training.heal.heal`.

``"constant"`` keeps ``lr``. ``"cosine"`` warms it up linearly over the first 5% of the steps and then decays it
to zero at ``steps`` along a half cosine (warm-up: Goyal et al. 2017; cosine decay: Loshchilov & Hutter, "SGDR",
ICLR 2017; both cited from memory -- common practice).
"""

from __future__ import annotations

import math
from collections.abc import Callable

from factorize.choices import HEAL_SCHEDULES

SCHEDULES = HEAL_SCHEDULES  # declared once, torch-free, for the command line
WARMUP_FRACTION = 0.05  # schedule "cosine": share of the steps spent warming the learning rate up linearly


def lr_factor(schedule: str, steps: int) -> Callable[[int], float]:
    """The multiplier of ``lr`` before optimizer step ``i + 1`` (``i`` = steps taken), for ``LambdaLR``."""
    if schedule == "constant":
        return lambda i: 1.0
    warm = max(1, round(WARMUP_FRACTION * steps))

    def factor(i: int) -> float:
        if i < warm:
            return (i + 1) / warm
        return 0.5 * (1.0 + math.cos(math.pi * min(1.0, (i - warm) / max(1, steps - warm))))
    return factor
