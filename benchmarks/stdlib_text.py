"""Unlabelled English sentences for distillation, taken from the docstrings of Python's standard library.

Healing is distillation: the original model labels every input, so any text of the right kind serves as training
input and no labels are needed (common practice: Hinton et al. 2015 distil on a "transfer set" that need not be
the original training data; cited from memory). When the user's own calibration text is a few hundred
sentences, a larger transfer set helps the factors generalise. The standard library's docstrings are on every machine
with Python, need no download, and are plain English prose -- a different register from the benchmark's held-out
sentences, which they never contain.
"""

from __future__ import annotations

import importlib
import inspect
import random
import re

# Modules whose import has no side effects (no GUI, no network, no printing).
MODULES = (
    "argparse asyncio base64 bisect calendar collections configparser contextlib copy csv dataclasses datetime "
    "decimal difflib email.message enum fractions functools gettext glob gzip hashlib heapq hmac html.parser "
    "http.client imaplib inspect io ipaddress itertools json locale logging mailbox math mimetypes numbers operator "
    "os pathlib pickle pprint queue random re sched secrets selectors shutil smtplib socket sqlite3 statistics "
    "string struct subprocess tarfile tempfile textwrap threading time typing unittest urllib.parse uuid warnings "
    "weakref zipfile"
).split()
_SENTENCE_END = re.compile(r"(?<=[.!?])\s+")
_PROSE = re.compile(r"^[A-Z][A-Za-z0-9 ,;:'()\-]+[.!?]$")  # starts with a capital, no code symbols, ends a sentence


def stdlib_sentences(n: int | None = None, *, seed: int = 0) -> list[str]:
    """Up to ``n`` distinct prose sentences of 5 to 40 words from standard-library docstrings, in a seeded order.

    The set depends on the Python version (about 3100 sentences on Python 3.11).
    """
    seen: set[str] = set()
    out: list[str] = []
    for name in MODULES:
        module = importlib.import_module(name)
        objects: list = [module]
        for _, value in sorted(vars(module).items()):
            if inspect.isclass(value):
                objects.append(value)
                objects += [v for _, v in sorted(vars(value).items()) if inspect.isfunction(v)]
            elif inspect.isfunction(value):
                objects.append(value)
        for obj in objects:
            for paragraph in (inspect.getdoc(obj) or "").split("\n\n"):
                for sentence in _SENTENCE_END.split(" ".join(paragraph.split())):
                    if 5 <= len(sentence.split()) <= 40 and _PROSE.match(sentence) and sentence not in seen:
                        seen.add(sentence)
                        out.append(sentence)
    random.Random(seed).shuffle(out)
    return out if n is None else out[:n]
