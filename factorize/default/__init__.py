"""Embedded defaults: a trained digits classifier with its data, and sentences for a text encoder.

See ``README.md`` in this folder for where the data comes from and how the weights were trained.
"""

from factorize.default.digits import DigitsMLP, load_default, load_digits_split
from factorize.default.sentences import CALIBRATION_SENTENCES, HELDOUT_SENTENCES

__all__ = [
    "CALIBRATION_SENTENCES",
    "HELDOUT_SENTENCES",
    "DigitsMLP",
    "load_default",
    "load_digits_split",
]
