"""``planetmix demo``: the invented scenario end to end, in a few minutes on a laptop.

Screening, a convex fit, a short Bayesian run, the star-to-planet hand-off and the HTML
report on the invented planet Orrin and its star Kestrel-7 (``case_studies/demo``), then
a comparison of the recovered recipe with the hidden truth the data were made from.
"""

from __future__ import annotations

import argparse
import json
import time
from pathlib import Path

from .cli import _COMMANDS, EXIT_OK, main, register
from .exceptions import InputError

__all__ = ["demo_folder"]


def demo_folder() -> Path:
    """Folder of the demo scenario (case file, invented data, hidden truth)."""
    here = Path(__file__).resolve().parents[1] / "case_studies" / "demo"
    if not (here / "orrin.toml").exists():
        raise InputError("the demo data are not installed beside the package; run from a "
                         "source checkout", file=str(here))
    return here


@register("demo", "run the built-in invented scenario end to end and write a report")
def _demo(parser: argparse.ArgumentParser):
    parser.add_argument("--out", default="demo_output", help="result folder")
    parser.add_argument("--quick", action="store_true",
                        help="fewer draws (for tests; diagnostics may not pass)")

    def run(args: argparse.Namespace) -> int:
        src = demo_folder()
        out = Path(args.out)
        case = str(src / "orrin.toml")
        steps: list[tuple[str, list[str], set[int]]] = [
            ("screen every mixture of up to 3 blocks", ["rank", case, "--out",
                                                       str(out / "rank")], {0}),
            ("convex fit of all candidates", ["fit", case, "--out", str(out / "fit")], {0}),
        ]
        if "sample" in _COMMANDS:
            draws = ["--draws", "100", "--tune", "100", "--chains", "2"] if args.quick else []
            # a failed diagnostics gate (exit 4) is reported, not fatal
            steps.append(("Bayesian posterior (settings from the case file)",
                          ["sample", case, "--out", str(out / "sample"), *draws], {0, 4}))
        if "star" in _COMMANDS:
            steps.append(("planet of the host star Kestrel-7",
                          ["star", str(src / "kestrel7.csv"), "--out", str(out / "star"),
                           "--draws", "200" if args.quick else "1000", "--seed", "7",
                           "--planet-mass-kg", "4.8e24"], {0}))
        t0 = time.perf_counter()
        for title, argv, ok in steps:
            print(f"\n== {title}: planetmix {' '.join(argv)}", flush=True)
            code = main(argv)
            if code not in ok:
                print(f"demo step failed with exit status {code}")
                return code
        if "report" in _COMMANDS:
            for _title, argv, _ok in steps:
                folder = argv[argv.index("--out") + 1]
                print(f"\n== report: planetmix report {folder}", flush=True)
                code = main(["report", folder])
                if code != 0:
                    return code
        truth = json.loads((src / "truth.json").read_text())
        fit = json.loads((out / "fit" / "fit.json").read_text())
        post = None
        if (out / "sample" / "sample.json").exists():
            post = json.loads((out / "sample" / "sample.json").read_text())["posterior"]

        def cell(block: dict | None) -> str:
            if not block:
                return ""
            return f"{block['median']:.4g} [{block['q05']:.4g}, {block['q95']:.4g}]"

        rows = [(f"weight {k}", truth["weights"].get(k, 0.0), fit["weights"][k],
                 post and post["weights"][k]) for k in fit["weights"]]
        rows += [(f"volatility {k}", truth["volatility"][k], fit["volatility"][k],
                  post and post["volatility"][k]) for k in ("T0", "slope")]
        rows += [("late-accretion fraction", truth["late_accretion_fraction"],
                  fit["late_accretion_fraction"], post and post["late_accretion_fraction"]),
                 ("core mass fraction", truth["core_mass_fraction"], fit["core_mass_fraction"],
                  post and post["core_mass_fraction"])]
        print("\n== recovered vs hidden truth")
        print(f"{'quantity':<26}{'truth':>10}{'convex fit':>12}   posterior median [5%, 95%]")
        for name, t, f, b in rows:
            print(f"{name:<26}{t:>10.4g}{f:>12.4g}   {cell(b)}")
        reports = sorted(out.glob("*/report.html"))
        print(f"\ndemo finished in {time.perf_counter() - t0:.0f} s; results in {out}/")
        for r in reports:
            print(f"  report: {r}")
        return EXIT_OK

    return run
