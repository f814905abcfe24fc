"""Block by block: the calibrated (activation-aware) shrink of a transformers checkpoint that does not fit in
memory.

The in-memory calibrated path (:func:`factorize.compress` with ``calibration=``) holds the whole model and every
layer's input second moment at once. Here only one block (one entry of the model's list of blocks, found in the
model itself: :func:`factorize.outofcore.architecture.find_blocks`) is materialised at a time, from the
memory-mapped safetensors shards, one tensor at a time. Any family whose model has one such list runs (checked
against transformers' classes: GPT-2, Llama, Mistral, Qwen2, Phi, Gemma, BERT); the projections inside a block
are ``nn.Linear`` or GPT-2's ``Conv1D`` (plan kind ``"transposed"``).

1. **Embed.** The calibration token ids go through the model's own forward up to its first block
   (:mod:`factorize.outofcore.stem`: embeddings, position embeddings, masks, rotary tables, built by the model's
   code on the parts outside the blocks, materialised from the checkpoint); the hidden states entering block 0
   and every block's extra inputs are written to a work directory, cut into a FIXED number of slices
   (``slices``, independent of how many workers run them), each slice into passes of at most
   ``tokens_per_pass`` tokens.
2. **Statistics, block by block.** For block i, one task per slice loads the block's weights, runs its slice's
   hidden states through it with the extra inputs the model itself gave the block, accumulates every selected
   projection's input second moment C = X^T X in float64 (q/k/v share one input and gate/up another: each
   distinct input is accumulated once), writes the block's outputs for block i + 1 and its partial moments to
   the work directory. The client sums the partial moments in slice order, computes each projection's whitened
   spectrum, values only (singular values of W L with L L^T = C + lambda I from ``eigvalsh`` of its Gram matrix,
   :func:`factorize.calibrated.aware.whitened_values`; no vectors before the plan), stores C for the factor step
   (its upper triangle when C is exactly symmetric: half the bytes, rebuilt bit for bit) and frees the block.
   The hidden states passed on are the
   ORIGINAL block's outputs: the ranks are only known once every block's spectrum is (the budget is allocated
   globally), so this first pass must not depend on them.
3. **Plan and factors.** The budget is allocated across all blocks' whitened spectra at once
   (:func:`factorize.plan.ranks.choose_ranks`), then each factored projection is one task: its weight from the
   shard and its group's C from the work directory give the factors at the planned rank (the only
   decomposition with vectors). The tasks run block after block; a group's C is deleted once its block's
   factors are written (at once when no member is factored): the work directory holds only what the plan
   still needs.

   With ``sequential=True`` the factors come instead from a second pass over the blocks, in order, that feeds
   each block what the already compressed blocks upstream produce (:mod:`factorize.outofcore.refit_tasks`): for
   each group of projections sharing an input, in the order the block calls them, the pair statistics of the
   original block on the original stream and of the partly compressed block on the compressed stream give the
   refitted factors (reduced-rank regression, as :func:`factorize.calibrated.sequential.compress_sequential` does in
   memory) at the ranks of the plan from step 3; then both streams advance one block. The ranks are those of the
   first pass (as the in-memory ``sequential=True`` plans before it refits). Cost: per block, one forward of
   the original and one of the compressed block per refitted group (each stopped once the group's input is
   seen), plus one of each to advance, against one forward per block without it.
4. **Write.** A sharded checkpoint in a new directory (same shard names, ``<module>.first.weight`` (r, in) and
   ``<module>.second.weight`` (out, r) for factored projections, everything else copied; the plan in the index's
   metadata) plus the source's config and tokenizer files. :func:`factorize.load_directory` (or
   ``factorize.load(fresh_model, directory)``) reads it back. The directory is written under a temporary name
   and renamed into place when complete: a failure leaves nothing.

The tasks live in :mod:`factorize.outofcore.block_tasks` and :mod:`factorize.outofcore.refit_tasks`, the
architecture on the meta device in :mod:`factorize.outofcore.architecture`, the embedding stage and the blocks'
extra inputs in :mod:`factorize.outofcore.stem`, the calibration slices in :mod:`factorize.outofcore.tokens`.

Byte-identical results on any engine (:mod:`factorize.cluster`): the slices are fixed, each task computes in
float64 under the same pinned torch thread count (``threads``; the client's count by default), and the client sums
the partial moments in slice order. Results are identical across engines and task orders for the same thread
count on the same kind of machine (float rounding of the float32 block forward depends on the CPU's kernels).

Memory: the client holds the parts of the model outside its blocks (except the output head) in float32 while it
embeds, of the token embedding only the rows of the calibration's distinct token ids (read a few thousand rows
at a time: a 256k-token table is never whole in memory), then at most one
group's moment (n x n float64; three of them with ``sequential``), which the whitening of one projection
factors in place once the moment is on disk (read again for the next projection of the group), plus the whitened
weight (m x n); a factor task likewise holds its moment, factored in place, its weight and the spectrum's vectors
(the 1.1B peak was this step for ``down_proj``, n = 5632: 254 MB less than with a copy); a task holds one block
in float32 (two with ``sequential``: the original and the compressed one), its slice's hidden states in and out, and the
block's intermediate activations for ``tokens_per_pass`` tokens. The report states the measured peak resident
memory of this process (``peak_rss_bytes``), the block's and the activations' sizes, and the bound
2 blocks + activations + 1 GB as a number, met or not.
"""

from __future__ import annotations

import dataclasses
import functools
import math
import os
import shutil
import tempfile
import time
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import torch
from safetensors import safe_open
from tqdm.auto import tqdm

from factorize.calibrated.aware import AwareFit, AwareSpectrum, decompose_aware, whitened_values
from factorize.calibrated.precision import metric_of
from factorize.checkpoints.files import Checkpoint
from factorize.choices import calibrated_methods
from factorize.cluster import Engine, open_engine
from factorize.errors import FactorizeError
from factorize.execution import Execution
from factorize.measure.factors import relative_error
from factorize.model.sites import Site
from factorize.outofcore.architecture import Architecture, block_candidates, block_linears, check_source
from factorize.outofcore.block_tasks import (
    ERROR_KEY,
    BlockTask,
    FactorTask,
    block_slice_task,
    factor_task,
    read_moment,
    save_reduction,
    save_work_file,
)
from factorize.outofcore.candidates import Candidate
from factorize.outofcore.options import BlockwiseOptions, check_blockwise, split_keywords
from factorize.outofcore.refit_tasks import PairTask, pair_task
from factorize.outofcore.results import BlockwiseShrink
from factorize.outofcore.slice_stats import MOMENT_PARTS, PAIR_PARTS, save_stats, summed_slices
from factorize.outofcore.stem import Stem, dumps, encode_extras, token_types
from factorize.outofcore.tasks import kept_as_is
from factorize.outofcore.tokens import slice_plan, token_batches
from factorize.outofcore.writer import CheckpointWriter, plan_bound
from factorize.plan.entries import factored_entries, is_factored_entry
from factorize.plan.forms import Priced, joint_plan, layer_budget, native_precision, price_site
from factorize.plan.policy import Policy, rank_needed, resolve_policy
from factorize.plan.ranks import choose_ranks, plan_summary
from factorize.storage import (
    check_free_space,
    check_output_path,
    new_temp_dir,
    peak_rss,
    publish_dir,
    reset_peak_rss,
    return_freed_memory,
)
from factorize.threads import torch_threads

BOUND_SLACK = 2**30  # the "+ 1 GB" of the memory bound
WEIGHT_SUFFIXES = (".safetensors", ".bin", ".pt", ".pth", ".ckpt", ".msgpack", ".h5")


@dataclass(frozen=True)
class _Run:
    """What every step of one shrink needs: the source, the chosen linears, the engine and work directory, the
    solver, and the options (``threads`` resolved)."""

    arch: Architecture
    batches: list  # (ids, mask, token types) token batches
    names: list[str]  # qualified linear names, block by block
    chosen: list[Candidate]
    engine: Engine
    work: Path
    policy: Policy
    aware: str  # "whiten" or "scale"
    solver: str
    options: BlockwiseOptions
    order: dict = dataclasses.field(default_factory=dict)  # block -> its groups' leaders, in call order
    group_of: dict = dataclasses.field(default_factory=dict)  # projection -> its group's leader (shared input)
    priced: dict = dataclasses.field(default_factory=dict)  # cost="bytes": projection -> (candidates, scale, notes)
    reductions: dict = dataclasses.field(default_factory=dict)  # projection -> its kept reduction's file (values first)

    @property
    def sites(self) -> list[Site]:
        return [c.site for c in self.chosen]

    @property
    def source(self) -> str:
        return str(self.arch.directory.resolve())

    @property
    def bytes(self) -> bool:
        """A budget in stored bytes: rank and stored precision chosen together (:mod:`factorize.plan.forms`)."""
        return self.policy.cost == "bytes"


def shrink_blockwise(
    src: str | os.PathLike,
    dst: str | os.PathLike,
    policy: Policy | None = None,
    options: BlockwiseOptions | None = None,
    *,
    calibration: Any,
    **keywords: Any,
) -> BlockwiseShrink:
    """Calibrated shrink of a transformers checkpoint, one block in memory at a time.

    Args:
        src: a transformers model directory (config.json and safetensors shards, or one model.safetensors) whose
            model has one list of blocks (GPT-2, Llama, Mistral, Qwen2, Phi, Gemma, BERT, ...); only read.
        dst: the output directory (created; refused if it exists unless ``force``).
        policy: a :class:`~factorize.plan.policy.Policy` or its keywords (``budget=0.5``, ``rank=``, ``energy=``,
            ``keep=``, ``multiple``, ``include`` / ``exclude`` on qualified linear names such as
            ``model.layers.*.mlp.*``); ``method`` ``"whiten"`` (default) or ``"scale"``, or a solver for the
            whitened matrix (``"gram"`` default); ``cost="bytes"`` with ``precisions`` chooses rank and stored
            precision together under a budget in stored bytes (docs/precision.md, "Out of core"). Only the
            linears inside the blocks are factored; the embedding, the final norm and the output head are copied.
        options: a :class:`~factorize.outofcore.options.BlockwiseOptions`, or its fields as keywords:
            ``cluster`` (where the tasks run, :func:`factorize.cluster.open_engine`: None for this process, or an
            :class:`~factorize.cluster.Engine`; with a cluster, ``work_dir`` must be on storage every worker
            reads), ``work_dir`` (needs about 2 x the activations plus every block's n x n float64 moments,
            stored as upper triangles),
            ``slices``, ``threads``, ``tokens_per_pass``, ``ridge``, ``precision``, ``force`` (replace an
            existing ``dst``), ``metadata`` (extra string entries for the output's metadata), ``progress``,
            ``sequential`` (refit each block to the compressed blocks upstream; ranks from the first pass).
        calibration: token ids: a (sequences, length) integer tensor, a list of them, or dicts with
            ``input_ids`` (and an ``attention_mask`` whose padded positions are left out of the statistics, and
            an encoder's ``token_type_ids`` for sentence pairs, fed to its embedding stage).

    Returns:
        a :class:`~factorize.outofcore.results.BlockwiseShrink`: the plan, one row per linear, the files, sizes,
        the calibration's size, where the tasks ran, and the measured peak resident memory of this process
        against the bound 2 blocks + activations + 1 GB.
    """
    started = time.perf_counter()
    return_freed_memory()  # the memory bound holds without an environment variable (storage.proc)
    peak_reset = reset_peak_rss()
    options, keywords = split_keywords(BlockwiseOptions, options, keywords)
    policy = resolve_policy(policy, keywords)
    aware, solver = calibrated_methods(policy.method)
    check_blockwise(policy, options)
    src_path, dst_path = Path(src), Path(dst)
    arch = check_source(src_path)
    vocab = int(arch.model.get_submodule(arch.embed.rsplit(".", 1)[0]).weight.shape[0])
    batches = token_batches(calibration, vocab, token_types(arch))
    if dst_path.resolve() == src_path.resolve() or src_path.resolve() in dst_path.resolve().parents:
        raise FactorizeError(f"{dst_path}: is (inside) the input directory; the input is never modified",
                             fix="choose another output directory")
    check_output_path(dst_path, force=options.force, directory=True)
    names = block_linears(arch, policy)
    if not names:
        raise FactorizeError(f"{src_path}: no linear layer inside the blocks matches the include/exclude patterns",
                             fix="check the patterns against names such as model.layers.0.self_attn.q_proj")
    chosen = block_candidates(arch, names)
    threads = torch.get_num_threads() if options.threads is None else int(options.threads)
    options = dataclasses.replace(options, threads=threads)
    sizes = _sizes(arch, batches, chosen)
    parent = Path(options.work_dir) if options.work_dir is not None else \
        (dst_path.parent if str(dst_path.parent) else Path("."))
    if not parent.is_dir():
        raise FactorizeError(f"{parent}: the work directory does not exist", fix="create it or pass another")
    if options.sequential:  # the embedding stage's output kept, two streams in and out; 3 moments a group, no block's
        need = 5 * sizes["activation_bytes"] + 3 * (options.slices + 1) * sizes["moments"] + arch.ckpt.nbytes
    else:
        need = 2 * sizes["activation_bytes"] + (arch.blocks + options.slices) * sizes["moments"] + arch.ckpt.nbytes
    check_free_space(parent, int(need), "the block-by-block work files (activations, moments, factors)")
    engine = open_engine(options.cluster, threads=threads)
    where = engine.describe()
    work = Path(tempfile.mkdtemp(prefix=".factorize-blocks-", dir=parent))
    run = _Run(arch, batches, names, chosen, engine, work, policy, aware, solver, options)
    try:
        with torch_threads(threads):
            plan, written = _shrink(run, src_path, dst_path)
    finally:
        shutil.rmtree(work, ignore_errors=True)
        if not isinstance(options.cluster, Engine):  # ours to close (an Engine passed in stays open; so does a Client)
            engine.close()
    peak = peak_rss()
    bound = 2 * sizes["block_bytes"] + sizes["activation_bytes"] + BOUND_SLACK
    return BlockwiseShrink(
        plan=plan, tensors=written["tensors"], files=written["files"], output=str(dst_path),
        params_before=written["params_before"], params_after=written["params_after"],
        kept_fraction=plan_summary(plan)["kept_fraction"], bytes_before=arch.ckpt.nbytes,
        bytes_after=written["bytes_after"], blocks=arch.blocks, sequences=plan["calibration"]["sequences"],
        tokens=sizes["tokens"], slices=plan["calibration"]["slices"], threads=threads, engine=where,
        seconds=time.perf_counter() - started, peak_rss_bytes=peak, peak_reset=peak_reset,
        block_bytes=sizes["block_bytes"], activation_bytes=sizes["activation_bytes"], bound_bytes=bound,
        bound_met=peak <= bound)


def _sizes(arch: Architecture, batches, chosen: list[Candidate]) -> dict[str, int | float]:
    """Tokens, activation and block bytes (float32), and the moments one block adds (n x n float64 each)."""
    tokens = sum(int(ids.numel()) for ids, *_ in batches)
    block_bytes = max(sum(math.prod(arch.where[n].tensors[n].shape) * 4 for n in arch.where
                          if n.startswith(f"{arch.prefix}.{i}.")) for i in range(arch.blocks))
    return {"tokens": tokens, "activation_bytes": tokens * int(arch.config.hidden_size) * 4,
            "block_bytes": block_bytes, "moments": sum(8 * c.site.shape[1] ** 2 for c in chosen) / arch.blocks}


def _shrink(run: _Run, src: Path, dst: Path) -> tuple[dict, dict]:
    """Statistics, plan, factors and the write; returns (plan, what was written)."""
    spectra, samples, groups = _statistics(run)
    plan = _bytes_plan(run, spectra) if run.bytes else choose_ranks(run.sites, spectra, run.policy, method=run.aware)
    batches = run.batches
    plan["calibration"] = {"method": run.aware, "solver": run.solver, "blockwise": True,
                           "sequential": run.options.sequential,
                           "sequences": sum(int(ids.shape[0]) for ids, *_ in batches),
                           "tokens": sum(int(ids.numel()) for ids, *_ in batches),
                           "samples": {n: samples[n] for n in run.names},
                           "slices": len(slice_plan(batches, run.options.slices)), "threads": run.options.threads}
    factors = _refit(run, plan) if run.options.sequential else _factors(run, plan, groups)
    return plan, _write(run, src, dst, plan, factors)


def _bytes_plan(run: _Run, spectra: Mapping[str, AwareSpectrum]) -> dict:
    """The joint plan of rank and stored precision under a budget in bytes, from every projection's candidate
    forms priced in the statistics pass (:func:`factorize.plan.forms.joint_plan`, as the in-memory calibrated
    ``compress(cost="bytes")`` plans). The in-memory path also measures "every layer rounded" against the joint
    plan on the calibration batches and keeps the better; that needs the whole model to run, so it is not done
    here (the plan records ``"checked": null``)."""
    names = [s.name for s in run.sites]
    priced = Priced(candidates={n: run.priced[n][0] for n in names},
                    natives={c.module: native_precision(c.weight.torch_dtype) for c in run.chosen},
                    scales={n: run.priced[n][1] for n in names},
                    notes={n: run.priced[n][2] for n in names if run.priced[n][2]})
    plan = joint_plan(run.sites, priced, spectra, layer_budget(run.sites, priced, run.policy),
                      policy=run.policy.to_dict(), method=run.aware)
    plan["selection"]["checked"] = None
    return plan


def _statistics(run: _Run) -> tuple[dict[str, AwareSpectrum], dict[str, int], dict[str, str]]:
    """Steps 1 and 2: embed, then per block the slice tasks, the summed moments and the whitened spectra."""
    arch, work = run.arch, run.work
    pieces = slice_plan(run.batches, run.options.slices)
    acts = work / "acts"
    acts.mkdir()
    _embed(run, pieces, acts / "0", work / "extras")
    spectra: dict[str, AwareSpectrum] = {}
    samples: dict[str, int] = {}
    groups: dict[str, str] = {}
    (work / "moments").mkdir()
    bar = tqdm(range(arch.blocks), desc="blocks", unit="block", disable=not run.options.progress, leave=False)
    for i in bar:
        mine = tuple(n for n in run.names if n.startswith(f"{arch.prefix}.{i}."))
        (acts / str(i + 1)).mkdir()
        (work / f"stats{i}").mkdir()
        tasks = [BlockTask(run.source, i, j, str(acts / str(i) / f"{j}.safetensors"),
                           str(acts / str(i + 1) / f"{j}.safetensors"), str(work / f"stats{i}" / f"{j}.safetensors"),
                           mine, run.options.threads, str(work / "extras" / f"{j}.safetensors"))
                 for j in range(len(pieces))]
        results = run.engine.map(block_slice_task, tasks, label=f"block {i}")
        if i > 0 or not run.options.sequential:  # the refit starts again from the embedding stage's output
            shutil.rmtree(acts / str(i), ignore_errors=True)  # this block's inputs are no longer needed
        run.order[i] = list(dict.fromkeys(results[0]["groups"].values()))  # the groups' leaders, in call order
        run.group_of.update(results[0]["groups"])
        if mine:
            _block_spectra(run, mine, results[0]["groups"], [t.stats for t in tasks], (spectra, samples, groups))
        shutil.rmtree(work / f"stats{i}", ignore_errors=True)
        missing = [n for n in mine if n not in spectra]
        if missing:
            raise FactorizeError("the calibration inputs never reached some linear layers", missing,
                                 fix="these layers are not called by the block's forward pass; exclude them")
    return spectra, samples, groups


def _block_spectra(run: _Run, mine: tuple[str, ...], block_groups: dict[str, str], files: list[str],
                   into: tuple[dict, dict, dict]) -> None:
    """One block's summed moments (stored for the factor step) and its linears' whitened spectra, values only."""
    spectra, samples, groups = into
    k_of = {s.name: (rank_needed(s, run.policy) if run.solver in ("auto", "randomized") else None)
            for s in run.sites if s.name in mine}
    for leader in sorted(set(block_groups.values()), key=mine.index):
        st, upper = summed_slices(leader, files, len(run.batches))
        path = run.work / "moments" / f"{leader}.safetensors"
        if not run.options.sequential:  # the refit collects its own statistics
            save_stats(st, path, upper)
            st.reread = functools.partial(read_moment, str(path))  # the whitening may now overwrite the moment
        del upper  # half a moment (127 MB at width 5632) not to hold through the whitening below
        for name in [n for n in mine if block_groups.get(n) == leader]:
            groups[name] = str(path)
            samples[name] = st.count
            c = next(c for c in run.chosen if c.module == name)
            W = c.read_matrix()  # (out, in), the checkpoint's dtype
            if run.bytes:  # every candidate form priced in the layer's calibrated metric: needs the vectors now
                spec = decompose_aware(W, st, method=run.aware, solver=run.solver, ridge=run.options.ridge,
                                       seed=run.policy.seed, precision=run.options.precision, name=name)
                run.priced[name] = price_site(c.site, W, spec, run.policy, metric_of(spec, st))
                spectra[name] = spec.without_vectors()
                del W, spec
                continue
            if run.aware == "whiten" and run.solver == "gram":  # values first: vectors only in the factor step
                spec = whitened_values(W, st, AwareFit(ridge=run.options.ridge), name=name,
                                       keep_reduction=not run.options.sequential,  # the refit fits anew
                                       execution=Execution(precision=run.options.precision))
                if spec.reduction is not None:  # the factor step takes the kept vectors from it (calibrated.reduced)
                    (run.work / "reductions").mkdir(exist_ok=True)
                    run.reductions[name] = save_reduction(spec, str(run.work / "reductions" / f"{name}.safetensors"))
                spectra[name] = spec.without_vectors()
                del W, spec
                continue
            spec = decompose_aware(W, st, method=run.aware, solver=run.solver, ridge=run.options.ridge,
                                   rank=k_of[name], seed=run.policy.seed, precision=run.options.precision, name=name)
            spectra[name] = spec.without_vectors()
            del W, spec
        del st


@torch.no_grad()
def _embed(run: _Run, pieces, out: Path, extras: Path) -> None:
    """Step 1: the hidden states entering block 0 of every slice, in float32, to ``out/<slice>.safetensors``,
    and every block's extra inputs (masks, position embeddings) to ``extras/<slice>.safetensors``, both from the
    model's own code (:mod:`factorize.outofcore.stem`). Each slice is cut here into the passes its tasks run,
    ``tokens_per_pass`` tokens at most (whole sequences)."""
    arch = run.arch
    out.mkdir()
    extras.mkdir()
    stem = Stem(arch, torch.cat([ids.reshape(-1) for ids, *_ in run.batches]))  # only these embedding rows
    for j, piece in enumerate(pieces):
        tensors, extra, described = {}, {}, {}
        k = 0
        for b, lo, hi in piece:
            ids, mask, kinds = run.batches[b]
            step = max(1, run.options.tokens_per_pass // max(int(ids.shape[1]), 1))
            for s in range(lo, hi, step):
                m = None if mask is None else mask[s:min(s + step, hi)].contiguous()
                h, per_block = stem.run(ids[s:min(s + step, hi)], m,
                                        None if kinds is None else kinds[s:min(s + step, hi)])
                tensors[f"h.{k}"] = h
                if m is not None:
                    tensors[f"m.{k}"] = m
                described[str(k)] = encode_extras(per_block, f"x.{k}", extra, arch.model_type)
                k += 1
        save_work_file(tensors, str(out / f"{j}.safetensors"))
        save_work_file(extra, str(extras / f"{j}.safetensors"), {"extras": dumps(described)})
        del tensors, extra
    del stem


def _factors(run: _Run, plan: dict, groups: dict[str, str]) -> dict[str, str]:
    """Step 3: one task per factored linear, block after block; name -> file of its factors.

    The scratch holds only the moments the plan still needs: those of groups with no factored member go as soon
    as the plan is known, each block's as soon as its factors are written."""
    (run.work / "factors").mkdir()
    o = run.options
    if run.bytes:  # every layer not kept as it is: factored, rounded, or rounded plus a correction
        dtypes = {c.module: c.weight.torch_dtype for c in run.chosen}
        todo = {n: (int(e["rank"] or 0), e) for n, e in plan["sites"].items() if not kept_as_is(e, dtypes[n])}
    else:
        todo = {e.name: (int(e.rank), None) for e in factored_entries(plan)}
    needed = {groups[n] for n in todo}
    for path in set(groups.values()) - needed:
        Path(path).unlink(missing_ok=True)
    for name in set(run.reductions) - set(todo):
        Path(run.reductions[name]).unlink(missing_ok=True)
    out: dict[str, str] = {}
    for i in range(run.arch.blocks):
        mine = [n for n in todo if n.startswith(f"{run.arch.prefix}.{i}.")]
        tasks = [FactorTask(run.source, n, groups[n], todo[n][0], run.aware, run.solver, o.ridge, run.policy.seed,
                            o.precision, str(run.work / "factors" / f"{n}.safetensors"), o.threads, todo[n][1],
                            run.reductions.get(n, "") if todo[n][1] is None else "")
                 for n in mine]
        if tasks:
            files = run.engine.map(factor_task, tasks, label=f"block {i} factors")
            out.update({t.module: f for t, f in zip(tasks, files)})
        for path in {groups[n] for n in mine} | {run.reductions[n] for n in mine if n in run.reductions}:
            Path(path).unlink(missing_ok=True)  # this block's moments and reductions are consumed
    return out


def _refit(run: _Run, plan: dict) -> dict[str, str]:
    """Step 3 with ``sequential=True``: block after block, each group of projections (in the order the block
    calls them) is refitted to the inputs the compressed model feeds it (pair statistics of the original and
    the partly compressed block, :mod:`factorize.outofcore.refit_tasks`), at the ranks the plan allocated from
    the first pass; then both streams of hidden states advance one block. Name -> file of its factors."""
    arch, work = run.arch, run.work
    ranks = {e.name: int(e.rank) for e in factored_entries(plan)}
    (work / "factors").mkdir()
    streams = (work / "acts" / "0", work / "acts" / "0")  # (reference, current): the same before block 0
    out: dict[str, str] = {}
    for i in tqdm(range(arch.blocks), desc="refit", unit="block", disable=not run.options.progress, leave=False):
        done: list[tuple[str, str]] = []  # (projection, factor file) refitted in this block so far
        for leader in run.order.get(i, []):
            members = [n for n in run.names if n in ranks and run.group_of.get(n) == leader]
            if members:
                done += _refit_group(run, i, streams, tuple(done), leader, {n: ranks[n] for n in members})
        nxt = (work / "acts" / f"ref{i + 1}", work / "acts" / f"cur{i + 1}")
        for d in nxt:
            d.mkdir()
        run.engine.map(pair_task, _pair_tasks(run, i, streams, tuple(done), "", None, nxt), label=f"block {i} advance")
        for d in set(streams):
            shutil.rmtree(d, ignore_errors=True)
        streams = nxt
        out.update(done)
    return out


def _pair_tasks(run: _Run, i: int, streams: tuple[Path, Path], done: tuple, group: str, stats: Path | None,
                outputs: tuple[Path, Path] | None) -> list[PairTask]:
    """One pair task per slice of block ``i`` (see :class:`~factorize.outofcore.refit_tasks.PairTask`)."""
    return [PairTask(run.source, i, j, str(streams[0] / f"{j}.safetensors"), str(streams[1] / f"{j}.safetensors"),
                     str(run.work / "extras" / f"{j}.safetensors"), done, group,
                     str(stats / f"{j}.safetensors") if stats else "",
                     (str(outputs[0] / f"{j}.safetensors"), str(outputs[1] / f"{j}.safetensors")) if outputs
                     else ("", ""), run.options.threads)
            for j in range(len(slice_plan(run.batches, run.options.slices)))]


def _refit_group(run: _Run, i: int, streams: tuple[Path, Path], done: tuple, leader: str,
                 ranks: dict[str, int]) -> list[tuple[str, str]]:
    """The pair statistics of one group of block ``i`` summed in slice order, then one factor task per member."""
    o = run.options
    pairs = run.work / f"pairs{i}"
    pairs.mkdir()
    tasks = _pair_tasks(run, i, streams, done, leader, pairs, None)
    run.engine.map(pair_task, tasks, label=f"block {i} refit")
    st, upper = summed_slices(leader, [t.stats for t in tasks], len(run.batches),
                        PAIR_PARTS if run.aware == "whiten" else MOMENT_PARTS)  # "scale" only re-whitens (as in memory)
    path = run.work / "moments" / f"{leader}.safetensors"
    save_stats(st, path, upper)
    del st, upper
    shutil.rmtree(pairs, ignore_errors=True)
    factors = [FactorTask(run.source, n, str(path), r, run.aware, run.solver, o.ridge, run.policy.seed, o.precision,
                          str(run.work / "factors" / f"{n}.safetensors"), o.threads) for n, r in ranks.items()]
    files = run.engine.map(factor_task, factors, label=f"block {i} factors")
    path.unlink()
    return [(t.module, f) for t, f in zip(factors, files)]


def _write(run: _Run, src: Path, dst: Path, plan: dict, factors: Mapping[str, str]) -> dict:
    """Step 4: the output directory, written under a temporary name and renamed into place."""
    ckpt = run.arch.ckpt

    def factors_of(c: Candidate, entry: dict) -> tuple[str | None, float]:
        path = factors.get(c.module)
        if path is not None and run.bytes:  # a stored form: its error was measured by the task
            with safe_open(path, framework="pt", device="cpu") as f:
                return path, float.fromhex(f.metadata()[ERROR_KEY])
        if not is_factored_entry(entry):
            return path, 0.0
        with safe_open(path, framework="pt", device="cpu") as f:
            A, B = f.get_tensor("first"), f.get_tensor("second")
        if A.shape[0] != entry["rank"]:
            raise FactorizeError(f"{path}: factors of rank {A.shape[0]}, the plan says {entry['rank']}")
        return path, relative_error(c.read_matrix(), B, A)

    # tensors the model does not have (legacy persistent buffers such as an old BERT's embeddings.position_ids,
    # which transformers ignores on loading) are left out, so the output loads strictly into the model
    known = set(run.arch.model.state_dict())
    drop = frozenset(n for n in run.arch.where if n not in known)
    writer = CheckpointWriter(ckpt, run.chosen, factors_of, plan_reserve=plan_bound(run.sites, run.policy),
                              progress=run.options.progress, stored_forms=run.bytes, drop=drop)
    check_free_space(dst.parent if str(dst.parent) else Path("."), writer.planned_bytes(plan["sites"]),
                     "the shrunk checkpoint")
    tmp = new_temp_dir(dst)
    try:
        names = [h.path.name for h in ckpt.files]
        if len(set(names)) < len(names):
            raise FactorizeError(f"{src}: several shards share a file name", fix="re-create the checkpoint")
        finals = [tmp / n for n in names] + ([tmp / ckpt.index.name] if ckpt.index else [])
        writer.write_all(finals, plan, run.options.metadata, force=False)
        _copy_side_files(src, tmp, ckpt)
        publish_dir(tmp, dst, force=run.options.force)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    files = [str(dst / p.name) for p in finals]
    return {"tensors": writer.report, "files": files, "params_before": writer.params_before,
            "params_after": writer.params_after, "bytes_after": sum(Path(f).stat().st_size for f in files)}


def _copy_side_files(src: Path, dst: Path, ckpt: Checkpoint) -> list[str]:
    """Config, generation config and tokenizer files: every small regular file that is not a weights file."""
    skip = {h.path.name for h in ckpt.files} | ({ckpt.index.name} if ckpt.index else set())
    copied = []
    for p in sorted(src.iterdir()):
        if p.name in skip or p.name.startswith(".") or not p.is_file() or p.name.endswith(WEIGHT_SUFFIXES) \
                or p.name.endswith(".index.json"):
            continue
        shutil.copyfile(p, dst / p.name)
        copied.append(p.name)
    return copied
