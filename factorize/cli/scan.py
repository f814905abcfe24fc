"""``factorize scan``: per-layer spectrum report (effective ranks, break-even rank, a suggested rank)."""

from __future__ import annotations

import math

from rich.table import Table

from factorize.errors import FactorizeError
from factorize.model.sites import Site, walk
from factorize.outofcore.candidates import checkpoint_spectra
from factorize.spectra.decompose import Spectrum
from factorize.spectra.sites import decompose_sites

from .common import execution, load, weights_file
from .render import UI, opt, spectrum_profile, spectrum_sketch


def run(args, ui: UI) -> dict:
    loaded = load(args, ui)
    if loaded.weights_only:
        with weights_file(loaded) as path:
            sites, spectra, passed = checkpoint_spectra(path, include=args.include, exclude=args.exclude,
                                                        progress=ui.progress)
        ui.note("weights-only mode: every 2-D tensor named <module>.weight is read as a linear layer's weight")
        skipped = [{"name": k, "reason": v} for k, v in passed.items()]
    else:
        found = walk(loaded.model, include=args.include, exclude=args.exclude)
        if not found.sites:
            raise FactorizeError("no factorizable layer found" + (" matching --include/--exclude" if args.include or
                                 args.exclude else ""), [f"{s.name}: {s.reason}" for s in found.skipped],
                                 fix="check the patterns against the model's module names")
        sites = found.sites
        spectra = decompose_sites(loaded.model, [s for s in sites if not s.tied_with], execution=execution(args, ui))
        skipped = [{"name": s.name, "reason": s.reason} for s in found.skipped]
    rows = [scan_row(s, spectra.get(s.name), args.target_energy, args.multiple) for s in sites]
    result = {"command": "scan", "model": loaded.source, "target_energy": args.target_energy, "layers": rows,
              "skipped": skipped, "params": sum(r["params"] for r in rows),
              "params_at_suggested": sum(r["params_at_suggested"] for r in rows)}
    if not ui.json_mode:
        render(result, ui)
    return result


def scan_row(site: Site, spec: Spectrum | None, target_energy: float, multiple: int) -> dict:
    """One layer's row: ranks at 90/99/99.9% energy, the break-even rank, and the suggested rank (the smallest
    keeping ``target_energy``, rounded up to ``multiple``; None when that is past break-even)."""
    row = {"name": site.name, "kind": site.kind, "shape": list(site.shape), "params": site.params,
           "break_even": site.break_even}
    if spec is None:  # tied weight
        row.update(rank_90=None, rank_99=None, rank_999=None, suggested_rank=None, params_at_suggested=site.params,
                   spectrum=[], note=f"weight shared with {', '.join(site.tied_with)}; kept dense")
        return row
    row.update(rank_90=spec.rank_for_energy(0.9), rank_99=spec.rank_for_energy(0.99),
               rank_999=spec.rank_for_energy(0.999))
    r = int(math.ceil(spec.rank_for_energy(target_energy) / multiple) * multiple)
    saves = site.saves_at(r)
    row.update(suggested_rank=r if saves else None,
               params_at_suggested=site.factored_params(r) if saves else site.params,
               predicted_error=spec.relative_error(r) if saves else 0.0, spectrum=spectrum_profile(spec.S.tolist()),
               note="" if saves else f"rank {r} for {target_energy:g} of the energy is past break-even; keep dense")
    return row


def render(result: dict, ui: UI) -> None:
    table = Table(title=f"scan: {result['model']}", title_justify="left")
    for name, justify in (("layer", "left"), ("kind", "left"), ("shape", "left"), ("params", "right"),
                          ("r@90%", "right"), ("r@99%", "right"), ("r@99.9%", "right"), ("break-even", "right"),
                          ("suggested", "right"), ("spectrum", "left")):
        table.add_column(name, justify=justify)  # type: ignore[arg-type]
    for r in result["layers"]:
        m, n = r["shape"]
        table.add_row(r["name"], r["kind"], f"{m}x{n}", f"{r['params']:,}", opt(r["rank_90"]), opt(r["rank_99"]),
                      opt(r["rank_999"]), str(r["break_even"]),
                      "dense" if r["suggested_rank"] is None else str(r["suggested_rank"]),
                      spectrum_sketch(r["spectrum"]))
    ui.table(table)  # whole when it fits, else one record per layer; names never cut
    before, after = result["params"], result["params_at_suggested"]
    ui.line(f"suggested ranks keep {result['target_energy']:g} of each layer's spectral energy: "
                 f"{before:,} -> {after:,} weight parameters ({after / max(before, 1):.1%} kept). "
                 "Spectrum: slices of the singular values, largest first, bar height s / s_max.")
    for s in result["skipped"]:
        ui.line(f"skipped {s['name']}: {s['reason']}")
