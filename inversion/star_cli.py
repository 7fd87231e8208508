"""The ``planetmix star`` and ``planetmix batch`` commands (docs/model.md sections 10, 11)."""

from __future__ import annotations

import argparse
import math
import os
from pathlib import Path

from .cli import EXIT_INFEASIBLE, EXIT_OK, register
from .exceptions import InputError

__all__: list[str] = []


def _add_common(parser: argparse.ArgumentParser) -> None:
    iron = parser.add_mutually_exclusive_group()
    iron.add_argument("--mantle-FeO-wt", type=float, default=None, dest="mantle_FeO_wt",
                      help="mantle FeO [wt%%] setting the iron split (default 8.0, Earth-like: "
                           "McDonough & Sun 1995)")
    iron.add_argument("--dIW", type=float, default=None, dest="dIW",
                      help="redox state dIW = 2 log10(x_FeO / x_Fe) instead of the mantle FeO")
    parser.add_argument("--planet-mass-kg", type=float, default=None,
                        help="planet mass [kg] for the total heat production of the mantle")
    parser.add_argument("--draws", type=int, default=1000, help="Monte Carlo draws per star")
    parser.add_argument("--seed", type=int, default=0, help="random seed")
    parser.add_argument("--solar", default="asplund2021",
                        help="solar reference table (see 'planetmix library solar')")
    parser.add_argument("--pattern", default=None, metavar="FILE",
                        help="devolatilisation pattern from a fit.json or sample.json result "
                             "(default: Earth-calibrated, BSE_MS95 vs CI)")


def _settings(args: argparse.Namespace):
    import components

    from .star import EARTH_MANTLE_FEO_WT, StarSettings, earth_calibrated_pattern, read_pattern

    if args.draws < 1:
        raise InputError("must be at least 1", field="--draws", value=args.draws)
    if args.planet_mass_kg is not None and not (math.isfinite(args.planet_mass_kg)
                                                and args.planet_mass_kg > 0):
        raise InputError("must be a positive mass in kg", field="--planet-mass-kg",
                         value=args.planet_mass_kg)
    if args.planet_mass_kg is not None:
        from components.units import check_in_range

        check_in_range(args.planet_mass_kg, "planet_mass_kg", field="--planet-mass-kg")
    if getattr(args, "star_id", None) is not None and not args.star_id.strip():
        raise InputError("must not be empty (leave the option out to use the file name)",
                         field="--star-id", value=args.star_id)
    if args.mantle_FeO_wt is not None and not 0 < args.mantle_FeO_wt < 60:
        raise InputError("must be between 0 and 60 wt%", field="--mantle-FeO-wt",
                         value=args.mantle_FeO_wt)
    if args.dIW is not None and not math.isfinite(args.dIW):
        raise InputError("must be a finite number", field="--dIW", value=args.dIW)
    if args.solar not in components.solar_tables():
        raise InputError(f"unknown solar table; choose one of {components.solar_tables()}",
                         field="--solar", value=args.solar)
    pattern = read_pattern(args.pattern) if args.pattern else earth_calibrated_pattern()
    feo = args.mantle_FeO_wt
    if feo is None and args.dIW is None:
        feo = EARTH_MANTLE_FEO_WT
    return StarSettings(pattern=pattern, solar=args.solar, mantle_FeO_wt=feo, dIW=args.dIW,
                        planet_mass_kg=args.planet_mass_kg, draws=args.draws, seed=args.seed)


def _fmt(s: dict[str, float], digits: int = 3) -> str:
    return (f"{s['median']:.{digits}g} (68%: {s['p16']:.{digits}g} to {s['p84']:.{digits}g}; "
            f"95%: {s['p2.5']:.{digits}g} to {s['p97.5']:.{digits}g})")


@register("star", "a rocky planet's composition from its host star's abundances")
def _star(parser: argparse.ArgumentParser):
    parser.add_argument("table", help="star abundances CSV: element, value ([X/H] dex), "
                                      "uncertainty (1-sigma dex)")
    parser.add_argument("--out", required=True, help="result folder")
    parser.add_argument("--star-id", default=None,
                        help="the star's id, used with --seed for its draws (default: the "
                             "file name); the same id gives the same draws as in a batch")
    _add_common(parser)

    def run(args: argparse.Namespace) -> int:
        from .handoff import write_handoff
        from .output import atomic_folder, provenance
        from .star import CAUTION, read_star_table, run_star

        star = read_star_table(args.table, star_id=args.star_id)
        settings = _settings(args)
        res = run_star(star, settings)
        meta = {
            "title": f"planet of star {star.star_id}",
            "method": "star to planet (docs/model.md sections 7, 10, 11): Monte Carlo over the "
                      "stellar abundance uncertainties",
            "star_id": star.star_id,
            "star_abundances_dex": {e: {"value": star.values[e], "uncertainty": star.errors[e]}
                                    for e in star.values},
            "devolatilisation": settings.pattern.as_dict(),
            "iron_split": ({"mantle_FeO_wt": settings.mantle_FeO_wt,
                            "label": "Earth-like" if settings.mantle_FeO_wt == 8.0 else "user"}
                           if settings.dIW is None else {"dIW": settings.dIW}),
            "flags": res.flags(),
            "caution": CAUTION,
            "provenance": provenance(
                tables=[settings.solar, settings.pattern.condensation_table, "lodders2003",
                        "mcdonough2003", "mcdonoughsun1995", "turcotteschubert2014"],
                component_names=["CI", "BSE_MS95"],
                extra={"star_table": str(Path(args.table).resolve()),
                       "settings": settings.as_dict(), "command": "star"}),
        }
        with atomic_folder(args.out) as tmp:
            data = write_handoff(tmp, res.draws, meta=meta)
        print(f"Star {star.star_id}: {len(star.values)} elements measured; "
              f"{settings.draws} draws (seed {settings.seed})")
        from .cli import _unit

        print(f"  devolatilisation: {settings.pattern.label} ({settings.pattern.form}: "
              + ", ".join(f"{k} = {v:.4g}{_unit(settings.pattern.form, k)}" for k, v in
                          settings.pattern.as_dict()["parameters"].items()) + ")")
        if res.infeasible_fraction >= 1.0:
            print(f"  infeasible: a mantle FeO of {settings.mantle_FeO_wt} wt% needs more iron "
                  "than the star provides in every draw; lower --mantle-FeO-wt or use --dIW")
            print(f"  written to {args.out}/planet.json, planet_draws.csv (values null)")
            return EXIT_INFEASIBLE
        print(f"  core mass fraction {_fmt(data['core_mass_fraction'])}")
        for name in ("Mg/Si_bulk", "Fe/Si_bulk", "Fe/Mg_bulk", "Mg#_mantle"):
            print(f"  {name} {_fmt(data['molar_ratios'][name])} (molar)")
        hp = data["heat_production"]
        print(f"  heat production {_fmt(hp['w_per_kg_mantle'])} W/kg of mantle"
              + (f"; total {_fmt(hp['total_w'])} W" if hp["total_w"] else ""))
        fl = res.flags()
        if fl["solar_ratio"]:
            print(f"  missing, taken at the solar X/Fe ratio: {' '.join(fl['solar_ratio'])}")
        if fl["ci_reference"]:
            print(f"  no photospheric solar value, CI-based reference: "
                  f"{' '.join(fl['ci_reference'])}")
        if fl["not_used"]:
            print(f"  given but not modelled: {' '.join(fl['not_used'])}")
        if fl["infeasible_draw_fraction"] > 0:
            print(f"  {100 * fl['infeasible_draw_fraction']:.1f}% of draws infeasible (the "
                  "mantle FeO needs more iron than the star provides); left out")
        print("  " + CAUTION)
        print(f"  written to {args.out}/planet.json, planet_draws.csv")
        return EXIT_OK

    return run


@register("batch", "star-to-planet for every star of a catalogue (Dask, resumable)")
def _batch(parser: argparse.ArgumentParser):
    parser.add_argument("catalogue", help="CSV: star_id, then <symbol> ([X/H] dex) and "
                                          "<symbol>_err (1-sigma dex) columns")
    parser.add_argument("--out", required=True, help="result folder (partitioned Parquet)")
    _add_common(parser)
    parser.add_argument("--resume", action="store_true",
                        help="continue an interrupted run in --out (same catalogue, options)")
    parser.add_argument("--scheduler", default=None, metavar="ADDRESS",
                        help="address of an existing Dask scheduler (default: a local "
                             "cluster)")
    parser.add_argument("--workers", type=int, default=None,
                        help="local Dask worker processes (default: the machine's cores); "
                             "1 computes in this process without Dask")
    parser.add_argument("--partition-size", type=int, default=200,
                        help="stars per partition (one Parquet file each)")

    def run(args: argparse.Namespace) -> int:
        import pandas as pd

        from .batch import local_cluster, run_batch, tune_allocator
        from .star import CAUTION

        settings = _settings(args)
        workers = args.workers if args.workers is not None else (os.cpu_count() or 1)
        if workers < 1:
            raise InputError("must be at least 1", field="--workers", value=args.workers)
        if args.scheduler and args.workers is not None:
            raise InputError("--workers applies to a local cluster; with --scheduler the "
                             "cluster decides", field="--workers", value=args.workers)
        if args.partition_size < 1:  # before a cluster is started
            raise InputError("must be at least 1", field="--partition-size",
                             value=args.partition_size)
        client = cluster = None
        if args.scheduler:
            from distributed import Client

            try:
                client = Client(args.scheduler, timeout="20s")
            except OSError as err:
                raise InputError(f"cannot reach the Dask scheduler: {err}",
                                 field="--scheduler", value=args.scheduler) from err
        elif workers > 1:
            from distributed import Client

            cluster = local_cluster(workers)
            client = Client(cluster)
        else:
            tune_allocator()
        try:
            summary = run_batch(args.catalogue, args.out, settings,
                                partition_size=args.partition_size, resume=args.resume,
                                client=client, progress=True,
                                workers_write=cluster is not None)
        finally:
            if client is not None:
                client.close()
            if cluster is not None:
                cluster.close()
        with pd.option_context("display.width", 120):
            print(summary.to_dataframe().to_string(index=False))
            if len(summary.failed):
                print("\nfailed:")
                print(summary.failed[["row", "star_id", "reason"]].head(20).to_string(
                    index=False))
                if len(summary.failed) > 20:
                    print(f"  ... and {len(summary.failed) - 20} more in {args.out}/failed.csv")
        print(f"\ndevolatilisation: {settings.pattern.label}")
        print(CAUTION)
        print(f"written to {args.out}/parts/part-*.parquet, summary.json, failed.csv "
              f"({summary.seconds:.1f} s)")
        return EXIT_OK

    return run


