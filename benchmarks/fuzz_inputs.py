"""Outside fuzz campaign over every input door of planetmix, at two levels.

Not a test: a measurement whose counts go into the closing note of an input-hardening
round. It is written apart from the suite's own fuzz test
(``tests/inversion/test_inputs_fuzz.py``) on purpose: other mutation operators, other
templates (it starts from the files ``planetmix template`` writes and from real result
folders), and the command line in subprocesses.

Library level (``--inputs N``, spread over the kinds below): each example is one
template with one mutation, handed to the loader of its door:

    target      inversion.case.read_target             (target composition CSV)
    component   components.read_component + case checks (user component CSV)
    case        inversion.case.load_case               (case TOML, with its tables)
    star        inversion.star.read_star_table          (one star's [X/H] table)
    catalogue   inversion.batch.read_catalogue          (catalogue CSV, row outcomes)
    pattern     inversion.star.read_pattern             (a fit.json read back)
    fit_trend   inversion.diagram.read_fit_trend        (a fit folder read back)
    report      inversion.report.build_report           (a mutated fit/star folder)

Command-line level (``--cli N``): ``planetmix fit/rank/star/batch/diagram/report/
library/template`` run as subprocesses on mutated files and options, and on special
files (a FIFO, ``/dev/zero``, a folder, a sparse file larger than the input limit).

Every outcome is put into one class:

    error            the project's own error (library: a PlanetmixError with a one-line
                     message naming the file; CLI: exit 2, one stderr line
                     ``planetmix: error: ...``)
    traceback        any other exception (CLI: a Python traceback on stderr, a hang past
                     the time limit, or an exit status outside 0-4/130)
    accepted         loaded / exit 0, nothing known to be wrong
    garbage          a planted invalid value was accepted, or the accepted values are
                     not finite / outside their declared range
    rejected_valid   a mutation that keeps the input valid was refused
    bad_message      a project error whose message is several lines or names no file

Run (moderate CPU: one process, ``nice``):

    nice -n 10 .venv/bin/python benchmarks/fuzz_inputs.py --inputs 10000 --cli 320

Options: ``--seed``, ``--only KIND,...``, ``--show N`` (examples printed per class),
``--json FILE`` (the counts and the distinct causes).
"""

from __future__ import annotations

import argparse
import json
import math
import os
import random
import re
import shutil
import signal
import subprocess
import sys
import tempfile
import time
import traceback
import warnings
from collections import Counter, defaultdict
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
TEMPLATES = ROOT / "inversion" / "templates"
PLANETMIX = [sys.executable, "-c", "import sys; from inversion.cli import main; "
             "sys.exit(main())"]
if (Path(sys.executable).parent / "planetmix").exists():
    PLANETMIX = [str(Path(sys.executable).parent / "planetmix")]

sys.path.insert(0, str(ROOT))
# the suite's fuzz test reads the templates the same way
from tests.inversion.test_inputs_fuzz import _split as csv_parts  # noqa: E402
from tests.inversion.test_inputs_fuzz import _template as tpl  # noqa: E402

CLASSES = ("error", "traceback", "accepted", "garbage", "rejected_valid", "bad_message")


@dataclass
class Ex:
    """One generated input.

    ``expect`` is ``"fail"`` (a planted invalid value), ``"pass"`` (a mutation that keeps
    the input valid) or ``""`` (no expectation: random damage).
    """

    kind: str
    files: dict[str, bytes]
    main: str
    op: str
    expect: str = ""


@dataclass
class Tally:
    """Counts of one campaign level."""

    counts: Counter = field(default_factory=Counter)
    causes: dict[str, Counter] = field(default_factory=lambda: defaultdict(Counter))
    samples: dict[str, list[str]] = field(default_factory=lambda: defaultdict(list))

    def add(self, cls: str, cause: str, detail: str = "") -> None:
        self.counts[cls] += 1
        self.causes[cls][cause] += 1
        if len(self.samples[cls]) < 400:
            self.samples[cls].append(f"{cause} | {detail[:300]}")


# =========================================================================== mutations
NUMBER = re.compile(r"(?<![A-Za-z0-9_.])[-+]?\d+(?:\.\d*)?(?:[eE][-+]?\d+)?(?![A-Za-z0-9_])")

#: Numbers that are wrong in any concentration, [X/H], sigma or setting they replace.
HOSTILE_NUMBERS = ["1e30", "1e300", "-1e300", "nan", "NaN", "inf", "-inf", "Infinity",
                   "1e999", "-0.5e3"]
#: Spellings that are not numbers at all.
NOT_NUMBERS = ["", "12abc", "1.2.3", "--1", "0x10", "1_000", "1,5", "\u22120.3", "½",
               "１２", "None", "null", "TRUE"]


def csv_join(comments: list[str], header: list[str], rows: list[list[str]],
             nl: str = "\n") -> str:
    return nl.join(comments + [",".join(header)] + [",".join(r) for r in rows]) + nl


def damage(rng: random.Random, data: bytes) -> tuple[bytes, str]:
    """Random, structure-blind damage (no expectation)."""
    b = bytearray(data)
    op = rng.choice(["zero", "trunc", "repeat", "splice", "highbit", "ctrl", "quote",
                     "shuffle-lines", "join-lines"])
    i = rng.randrange(max(1, len(b)))
    if op == "zero":
        b[i:i + 1] = b"\x00"
    elif op == "trunc":
        b = b[:i]
    elif op == "repeat":
        b[i:i] = b[i:i + rng.randint(1, 64)] * rng.randint(2, 20)
    elif op == "splice":
        j = rng.randrange(max(1, len(b)))
        b[i:i] = data[j:j + rng.randint(1, 40)]
    elif op == "highbit":
        for k in rng.sample(range(len(b)), min(len(b), rng.randint(1, 4))):
            b[k] |= 0x80
    elif op == "ctrl":
        b[i:i] = bytes([rng.choice([0x0b, 0x0c, 0x1c, 0x1e, 0x85, 0x0d, 0x7f])])
    elif op == "quote":
        b[i:i] = b'"'
    elif op == "shuffle-lines":
        lines = bytes(b).split(b"\n")
        rng.shuffle(lines)
        b = bytearray(b"\n".join(lines))
    else:
        b = bytearray(bytes(b).replace(b"\n", b" ", rng.randint(1, 3)))
    return bytes(b), f"damage:{op}"


def recode(rng: random.Random, text: str) -> tuple[bytes, str, str]:
    """Encodings: (data, op, expect)."""
    op = rng.choice(["bom", "bom+crlf", "cr-only", "utf-16-le", "utf-32", "cp1252-mu",
                     "bz2", "zip-magic", "nul-tail", "empty", "only-comments",
                     "trailing-ws", "tabs-around"])
    if op == "bom":
        return b"\xef\xbb\xbf" + text.encode(), op, "pass"
    if op == "bom+crlf":
        return b"\xef\xbb\xbf" + text.replace("\n", "\r\n").encode(), op, "pass"
    if op == "cr-only":
        return text.replace("\n", "\r").encode(), op, ""
    if op == "utf-16-le":
        return text.encode("utf-16-le"), op, "fail"
    if op == "utf-32":
        return text.encode("utf-32"), op, "fail"
    if op == "cp1252-mu":
        return ("# unit note: \u00b5g/g\n" + text).encode("cp1252"), op, "fail"
    if op == "bz2":
        import bz2

        return bz2.compress(text.encode()), op, "fail"
    if op == "zip-magic":
        return b"PK\x03\x04" + os.urandom(60), op, "fail"
    if op == "nul-tail":
        return text.encode() + b"\x00" * 16, op, "fail"
    if op == "empty":
        return b"", op, "fail"
    if op == "only-comments":
        return "".join(ln + "\n" for ln in text.splitlines() if ln.startswith("#")).encode() \
            or b"# nothing\n", op, "fail"
    if op == "trailing-ws":
        return "\n".join(ln + "  " if ln.startswith("#") else ln
                         for ln in text.splitlines()).encode() + b"\n", op, "pass"
    return text.encode(), op + "(control)", "pass"


# ---------------------------------------------------------------------- CSV tables
def gen_comp_table(rng: random.Random, kind: str) -> Ex:
    """target / component / diagram tables (element,value,unit,...)."""
    name = "target.csv" if kind == "target" else "component.csv"
    text = tpl(name)
    com, head, rows = csv_parts(text)
    rows = [list(r) for r in rows]
    r = rng.random()
    if r < 0.15:
        d, op = damage(rng, text.encode())
        return Ex(kind, {name: d}, name, op)
    if r < 0.28:
        d, op, exp = recode(rng, text)
        return Ex(kind, {name: d}, name, "enc:" + op, exp)
    iv, iu = head.index("value"), head.index("unit")
    ic = [k for k, h in enumerate(head) if h.startswith("uncertainty")][0]
    i = rng.randrange(len(rows))
    ops = ["hostile-value", "not-number", "negative", "over-100", "total-200",
           "hostile-sigma", "neg-sigma", "species", "unit", "element-case", "padded",
           "quoted", "sci-notation", "reorder-rows", "reorder-cols", "drop-ref",
           "dup-element", "oxide-and-element", "extra-col", "missing-col",
           "sep=", "header-twice", "long-cell", "ppm-huge"]
    if kind == "component":
        ops += ["iso-header", "iso-header-ok", "iso-header-twice", "name-lib", "kind-bad"]
    op = rng.choice(ops)
    exp = "fail"
    if op == "hostile-value":
        rows[i][iv] = rng.choice(HOSTILE_NUMBERS)
    elif op == "not-number":
        rows[i][iv] = rng.choice([v for v in NOT_NUMBERS if v != ""])
        if rows[i][iv] in ("1,5",):
            rows[i][iv] = '"1,5"'
    elif op == "negative":
        rows[i][iv] = "-" + rows[i][iv].lstrip("-")
        if float(rows[i][iv]) == 0:
            exp = ""
    elif op == "over-100":
        rows[i][iv], rows[i][iu] = rng.choice(["100.5", "250", "1e4"]), "wt%"
    elif op == "total-200":
        # every wt% row doubled and more: the total exceeds 100 wt% by far
        for rr in rows:
            if rr[iu] == "wt%":
                rr[iv] = f"{float(rr[iv]) * 2.5:g}"
    elif op == "hostile-sigma":
        rows[i][ic] = rng.choice(["nan", "inf", "1e300", "-inf", "abc"])
    elif op == "neg-sigma":
        rows[i][ic] = "-" + (rows[i][ic] or "1")
    elif op == "species":
        rows[i][0] = rng.choice(["FeO0", "Si0O2", "MgO2", "SiO5", "Ca2O", "Fe3O", "Al2O",
                                 "K2O2", "H2O", "CO2", "Xy", "Mg+", "Mg2", "MgO MgO",
                                 "Og", "Uue", "e", "O"])
        if rows[i][0] in ("H2O", "CO2", "O"):
            exp = ""  # a volatile or O itself: the outcome is the project's choice
    elif op == "unit":
        rows[i][iu] = rng.choice(["ppt", "mol%", "g", "wt%%", "ppm/ppb", "percent",
                                  "kg", "mg/kg2", "dex"])
    elif op == "element-case":
        rows[i][0] = rng.choice([rows[i][0].lower(), rows[i][0].upper()])
        if rows[i][0] in ("O",) or rows[i][0] == rows[i][0].lower() == rows[i][0]:
            pass
        exp = "" if rows[i][0] in {r0[0] for r0 in rows} else "fail"
    elif op == "padded":
        rows[i] = [f" {c} " for c in rows[i]]
        exp = "pass"
    elif op == "quoted":
        rows[i] = [f'"{c}"' for c in rows[i]]
        exp = "pass"
    elif op == "sci-notation":
        v = float(rows[i][iv])
        rows[i][iv] = f"{v:.6e}"
        exp = "pass"
    elif op == "reorder-rows":
        rng.shuffle(rows)
        exp = "pass"
    elif op == "reorder-cols":
        perm = list(range(len(head)))
        rng.shuffle(perm)
        head = [head[k] for k in perm]
        rows = [[rr[k] if k < len(rr) else "" for k in perm] for rr in rows]
        exp = "pass"
    elif op == "drop-ref":
        rows = [rr for rr in rows if rr[0] not in ("Mg", "MgO")]
        exp = "fail" if kind == "target" else ""
    elif op == "dup-element":
        rows.append(list(rows[i]))
    elif op == "oxide-and-element":
        # the same element given as oxide and as element
        pairs = {"SiO2": "Si", "MgO": "Mg", "FeO": "Fe", "CaO": "Ca", "Al2O3": "Al"}
        ox = [rr for rr in rows if rr[0] in pairs]
        if not ox:
            exp = ""
        else:
            rr = list(ox[0])
            rr[0] = pairs[rr[0]]
            rows.append(rr)
    elif op == "extra-col":
        head = head + ["comment"]
        rows = [rr + ["x"] for rr in rows]
        exp = ""
    elif op == "missing-col":
        k = rng.choice([iv, iu])
        head = head[:k] + head[k + 1:]
        rows = [rr[:k] + rr[k + 1:] for rr in rows]
    elif op == "sep=":
        com = ["sep=,"] + com
    elif op == "header-twice":
        rows.insert(i, list(head))
    elif op == "long-cell":
        rows[i][iv] = "1" * 5000
    elif op == "ppm-huge":
        rows[i][iv], rows[i][iu] = "2e6", "ppm"
    elif op == "iso-header":
        bad = rng.choice(["inf 0.1", "nan 0.2", "0.3 -0.1", "0.3 0", "0.1 nan", "1e5 1",
                          "0.1", "0.1 0.2 0.3", "x y"])
        key = rng.choice(['e54Cr', 'e50Ti', 'D17O', 'e48Ca'])
        com = [c for c in com if not c.startswith(f"# {key}:")] + [f"# {key}: {bad}"]
    elif op == "iso-header-ok":
        com = [c for c in com if not c.startswith("# e54Cr:")] + ["# e54Cr: 0.50 0.10"]
        exp = "pass"
    elif op == "iso-header-twice":
        com = com + ["# e54Cr: 0.50 0.10"]  # the template holds one already
    elif op == "name-lib":
        com = [c for c in com if not c.startswith("# name:")] + [
            f"# name: {rng.choice(['CI', 'EH', 'CV', 'BSE_MS95'])}"]
    else:  # kind-bad
        com = [c for c in com if not c.startswith("# kind:")] + ["# kind: planet"]
    return Ex(kind, {name: csv_join(com, head, rows).encode()}, name, op, exp)


def gen_star(rng: random.Random) -> Ex:
    name = "star.csv"
    text = tpl("star_abundances.csv")
    com, head, rows = csv_parts(text)
    rows = [list(r) for r in rows]
    r = rng.random()
    if r < 0.15:
        d, op = damage(rng, text.encode())
        return Ex("star", {name: d}, name, op)
    if r < 0.28:
        d, op, exp = recode(rng, text)
        return Ex("star", {name: d}, name, "enc:" + op, exp)
    i = rng.randrange(len(rows))
    op = rng.choice(["xh-hostile", "xh-400", "xh-3.2", "sig-hostile", "sig-neg", "sig-5",
                     "element", "dup", "reorder", "sci", "padded", "plus-sign",
                     "unused-element", "no-fe", "empty-sigma", "H-row"])
    exp = "fail"
    if op == "xh-hostile":
        rows[i][1] = rng.choice(HOSTILE_NUMBERS + ["abc"])
    elif op == "xh-400":
        rows[i][1] = rng.choice(["400", "-400", "40", "-12"])
    elif op == "xh-3.2":
        rows[i][1] = rng.choice(["3.2", "-3.2"])
    elif op == "sig-hostile":
        rows[i][2] = rng.choice(["nan", "inf", "1e300", "abc"])
    elif op == "sig-neg":
        rows[i][2] = "-0.05"
    elif op == "sig-5":
        rows[i][2] = "5"
    elif op == "element":
        rows[i][0] = rng.choice(["Xx", "FeO", "fe", "Fe ", "Unobtainium", "H2", "1"])
        if rows[i][0] == "Fe ":
            exp = ""
    elif op == "dup":
        rows.append(list(rows[i]))
    elif op == "reorder":
        rng.shuffle(rows)
        exp = "pass"
    elif op == "sci":
        rows[i][1] = f"{float(rows[i][1]):.3e}"
        exp = "pass"
    elif op == "padded":
        rows[i] = [f" {c}" for c in rows[i]]
        exp = "pass"
    elif op == "plus-sign":
        rows[i][1] = "+" + rows[i][1].lstrip("+-")
        exp = "pass"
    elif op == "unused-element":
        rows.append(["Li", "0.1", "0.1"])
        exp = "pass"
    elif op == "no-fe":
        rows = [rr for rr in rows if rr[0] != "Fe"]
        exp = ""
    elif op == "empty-sigma":
        rows[i][2] = ""
        exp = ""
    else:
        rows.append(["H", "0.0", "0.01"])
        exp = ""
    return Ex("star", {name: csv_join(com, head, rows).encode()}, name, op, exp)


def gen_catalogue(rng: random.Random) -> Ex:
    """Catalogue: a planted problem must make its own row ``failed`` (or the file an
    error), never an ``ok`` row."""
    name = "catalog.csv"
    text = tpl("catalog.csv")
    com, head, rows = csv_parts(text)
    rows = [list(r) for r in rows]
    r = rng.random()
    if r < 0.15:
        d, op = damage(rng, text.encode())
        return Ex("catalogue", {name: d}, name, op)
    if r < 0.27:
        d, op, exp = recode(rng, text)
        return Ex("catalogue", {name: d}, name, "enc:" + op, exp)
    i = rng.randrange(len(rows))
    vcols = [k for k, h in enumerate(head) if h != "star_id" and not h.endswith("_err")]
    k = rng.choice(vcols)
    if rows[i][k] == "":
        rows[i][k], rows[i][k + 1] = "0.1", "0.05"
    op = rng.choice(["xh-400", "xh-hostile", "sig-hostile", "sig-neg", "value-no-sigma",
                     "row-extra", "row-short", "cut", "dup-id", "empty-id", "quoted-comma",
                     "reorder", "unknown-col", "dup-col", "padded-id", "sci"])
    exp = f"row{i}"
    if op == "xh-400":
        rows[i][k] = rng.choice(["400", "-400", "3.5"])
    elif op == "xh-hostile":
        rows[i][k] = rng.choice(["inf", "-inf", "1e300", "abc", "0x1"])
    elif op == "sig-hostile":
        rows[i][k + 1] = rng.choice(["inf", "1e300", "abc", "nan"])
        if rows[i][k + 1] == "nan":
            exp = ""  # nan may be read as "not given" -> missing uncertainty, a failure
            exp = f"row{i}"
    elif op == "sig-neg":
        rows[i][k + 1] = "-0.1"
    elif op == "value-no-sigma":
        rows[i][k + 1] = ""
    elif op == "row-extra":
        rows[i] = rows[i] + [rng.choice(["", "0.1", "x"])]
    elif op == "row-short":
        del rows[i][rng.randrange(1, len(rows[i]))]
    elif op == "cut":
        body = csv_join(com, head, rows)
        cut = body.rstrip("\n")
        cut = cut[:cut.rfind(",", cut.rfind("\n"))]
        return Ex("catalogue", {name: cut.encode()}, name, op, f"row{len(rows) - 1}")
    elif op == "dup-id":
        rows.append(list(rows[i]))
        exp = f"row{len(rows) - 1}"
    elif op == "empty-id":
        rows[i][0] = ""
    elif op == "quoted-comma":
        rows[i][0] = f'"{rows[i][0]},x"'
        exp = "pass"
    elif op == "reorder":
        rng.shuffle(rows)
        exp = "pass"
    elif op == "unknown-col":
        head = head + ["Teff"]
        rows = [rr + ["5800"] for rr in rows]
        exp = "fail"
    elif op == "dup-col":
        head = head + [head[k]]
        rows = [rr + [rr[k]] for rr in rows]
        exp = "fail"
    elif op == "padded-id":
        rows[i][0] = f"  {rows[i][0]}  "
        exp = "pass"
    else:
        rows[i][k] = f"{float(rows[i][k]):.2e}"
        exp = "pass"
    return Ex("catalogue", {name: csv_join(com, head, rows).encode()}, name, op, exp)


# ---------------------------------------------------------------------- case TOML
def _toml_value(rng: random.Random) -> tuple[str, str]:
    """A TOML value and its type name."""
    return rng.choice([("true", "bool"), ("0", "int"), ("-3", "int"), ("2.5", "float"),
                       ("nan", "nan"), ("inf", "inf"), ("-inf", "inf"), ("1e308", "huge"),
                       ('"banana"', "str"), ('""', "str"), ("[]", "list"),
                       ("[1, 2]", "list"), ('["a", 0.7]', "list"), ("{}", "table"),
                       ("{ a = 1 }", "table"), ("1979-05-27T07:32:00Z", "datetime"),
                       ('"/dev/zero"', "str"), ('"."', "str"), ('"' + "y" * 400 + '"', "str")])


CASE_SETTINGS = [  # (section, line, expect) planted settings
    ("target", "minimum_uncertainty_dex = -0.1", "fail"),
    ("target", "minimum_uncertainty_dex = 5", "fail"),
    ("target", "minimum_uncertainty_dex = 0.02", "pass"),
    ("target", "default_uncertainty_pct = 0", "fail"),
    ("target", "default_uncertainty_pct = -5", "fail"),
    ("target", "reference_element = \"Xx\"", "fail"),
    ("target", "reference_element = \"Fe\"", ""),
    ("target", "planet_mass_kg = 0", "fail"),
    ("target", "planet_mass_kg = -5.972e24", "fail"),
    ("target", "planet_mass_kg = 1e40", "fail"),
    ("target", "mantle_mass_kg = 1e30", "fail"),
    ("target", "mantle_mass_kg = -1", "fail"),
    ("target", "mantle_mass_kg = 4.0e24", "pass"),
    ("target", "tabel = \"target.csv\"", "fail"),
    ("core", "dIW = -2.2", "fail"),  # together with mantle_FeO_wt: give one
    ("core", "partitioning = \"exotic\"", "fail"),
    ("core", "pressure_GPa = -5", "fail"),
    ("core", "pressure_GPa = [80.0, 10.0]", "fail"),
    ("core", "pressure_GPa = [10.0, 1e9]", "fail"),
    ("core", "temperature_K = -100", "fail"),
    ("core", "temperature_K = \"hot\"", "fail"),
    ("core", "mantle_FeO_w = 8.0", "fail"),
    ("volatility", "form = \"cubic\"", "fail"),
    ("volatility", "condensation_table = \"mine\"", "fail"),
    ("building_blocks", "max_mixture_size = 0", "fail"),
    ("building_blocks", "max_mixture_size = -1", "fail"),
    ("building_blocks", "max_mixture_size = 2.5", "fail"),
    ("building_blocks", "max_mixture_size = 100", ""),
]


def _section_insert(text: str, section: str, line: str) -> str:
    lines = text.splitlines()
    if f"[{section}]" not in lines:
        return text + f"\n[{section}]\n{line}\n"
    k = lines.index(f"[{section}]")
    return "\n".join(lines[:k + 1] + [line] + lines[k + 1:]) + "\n"


def gen_case(rng: random.Random) -> Ex:
    text = tpl("case.toml")
    files = {"target.csv": tpl("target.csv").encode(),
             "component.csv": tpl("component.csv").encode()}
    r = rng.random()
    if r < 0.12:
        d, op = damage(rng, text.encode())
        return Ex("case", {**files, "case.toml": d}, "case.toml", op)
    if r < 0.22:
        d, op, exp = recode(rng, text)
        if op.startswith("only-comments"):
            exp = "fail"
        return Ex("case", {**files, "case.toml": d}, "case.toml", "enc:" + op, exp)
    lines = text.splitlines()
    if r < 0.55:  # every key of the template gets a value of another type or range
        keyed = [k for k, ln in enumerate(lines) if re.match(r"^[A-Za-z_0-9]+ = ", ln)]
        k = rng.choice(keyed)
        key = lines[k].split(" = ")[0]
        val, typ = _toml_value(rng)
        lines[k] = f"{key} = {val}"
        exp = "fail"
        if key == "title" and typ == "str":
            exp = "pass" if val != '""' else ""
        if key in ("default_uncertainty_pct", "mantle_FeO_wt") and val in ("2.5",):
            exp = "pass"
        if key == "planet_mass_kg" and val == "2.5":
            exp = "fail"
        if key == "max_mixture_size" and val in ("0", "-3"):
            exp = "fail"
        if key in ("tune", "seed") and val == "0":
            exp = "pass"  # no tuning steps / seed 0 are valid settings
        if key == "isotope_window_sigma" and val == "2.5":
            exp = "pass"
        if key == "exclude" and val == "[]":
            exp = "pass"
        if key in ("e54Cr", "e50Ti") and val == "[1, 2]":
            exp = "pass"  # [value, 1-sigma]
        return Ex("case", {**files, "case.toml": ("\n".join(lines) + "\n").encode()},
                  "case.toml", f"type:{key}={typ}", exp)
    if r < 0.75:
        sec, line, exp = rng.choice(CASE_SETTINGS)
        t = text
        if sec == "core" and line.startswith("dIW"):
            pass
        key = line.split(" = ")[0]
        t = "\n".join(ln for ln in t.splitlines() if not ln.startswith(key + " ")) + "\n"
        return Ex("case", {**files, "case.toml": _section_insert(t, sec, line).encode()},
                  "case.toml", f"set:{line[:40]}", exp)
    op = rng.choice(["no-target", "target-missing-file", "target-is-fifo-name",
                     "candidate-unknown", "candidate-dup", "candidate-empty",
                     "user-comp", "user-comp-lib-name", "user-comp-iso-bad",
                     "isotopes-ok", "isotopes-bad", "late-comp-missing",
                     "deep-table", "deep-array", "dup-key", "unknown-section",
                     "abs-path-dev", "priors-bad", "core-D-ok", "core-D-bad"])
    exp = "fail"
    t = text
    if op == "no-target":
        t = t.replace('table = "target.csv"\n', "")
    elif op == "target-missing-file":
        t = t.replace('table = "target.csv"', 'table = "nope.csv"')
    elif op == "target-is-fifo-name":
        t = t.replace('table = "target.csv"', 'table = "/dev/urandom"')
    elif op == "candidate-unknown":
        t = t.replace('"CI", "CV", "H", "EH"', '"CI", "XX"')
    elif op == "candidate-dup":
        t = t.replace('"CI", "CV", "H", "EH"', '"CI", "CI"')
    elif op == "candidate-empty":
        t = t.replace('"CI", "CV", "H", "EH"', "")
    elif op == "user-comp":
        t = t.replace('"CI", "CV", "H", "EH"', '"CI", "component.csv"')
        exp = "pass"
    elif op == "user-comp-lib-name":
        t = t.replace('"CI", "CV", "H", "EH"', '"CI", "component.csv"')
        files["component.csv"] = files["component.csv"].replace(b"# name: MyBlock",
                                                                b"# name: EH")
    elif op == "user-comp-iso-bad":
        t = t.replace('"CI", "CV", "H", "EH"', '"CI", "component.csv"')
        files["component.csv"] = files["component.csv"].replace(
            b"# e54Cr: 1.56 0.06", rng.choice([b"# e54Cr: 1.56 -0.06", b"# e54Cr: inf 0.06",
                                               b"# e54Cr: 1.56 0.06\n# e54Cr: 9 9"]))
    elif op == "isotopes-ok":
        t = t.replace("e54Cr = [0.0, 0.1]", "e54Cr = [0.2, 0.15]")
        exp = "pass"
    elif op == "isotopes-bad":
        t = _section_insert(t, "isotopes", rng.choice(
            ["e54Cr = [0.0, -0.1]", "e54Cr = [inf, 0.1]", "e54Cr = \"0.1\"",
             "e54Cr = [0.1]", "nonsense = [0.0, 0.1]", "e54Cr = [1e9, 0.1]"]))
    elif op == "late-comp-missing":
        t = _section_insert(t, "late_accretion", 'component = "nothing.csv"')
        t = "\n".join(ln for ln in t.splitlines() if ln.strip() != 'component = "CI"') + "\n"
    elif op == "deep-table":
        t = "a = " + "{b = " * 600 + "1" + "}" * 600 + "\n" + t
    elif op == "deep-array":
        t = "a = " + "[" * 5000 + "]" * 5000 + "\n" + t
    elif op == "dup-key":
        t = _section_insert(t, "target", 'table = "target.csv"')
    elif op == "unknown-section":
        t = t + "\n[fitt]\nx = 1\n"
    elif op == "abs-path-dev":
        t = t.replace('"CI", "CV", "H", "EH"', '"CI", "/dev/zero.csv"')
    elif op == "priors-bad":
        t = t + rng.choice(["\n[priors]\ntau = 3\n", "\n[priors.tau]\ndist = 1\n",
                            "\n[priors.w]\ndist = \"Dirichlet\"\nalpha = [\"a\"]\n",
                            "\n[priors.tau]\ndist = \"Normal\"\nmu = nan\n"])
    elif op == "core-D-ok":
        t = t.replace("Ni = 26.0", "Ni = 25.0\nCo = 24.0")
        exp = "pass"
    else:
        t = t.replace("Ni = 26.0", rng.choice(["Ni = -3", "Ni = inf", "Ar = 1",
                                               "Ni = \"big\"", "Ni = 1e12"]))
    return Ex("case", {**files, "case.toml": t.encode()}, "case.toml", op, exp)


# ---------------------------------------------------------------------- results read back
_RESULTS: dict[str, dict[str, bytes]] = {}


def _result_folders(work: Path) -> None:
    """Real fit and star result folders of the templates (made once)."""
    if _RESULTS:
        return
    src = work / "_make"
    src.mkdir(parents=True, exist_ok=True)
    for n in ("case.toml", "target.csv", "star_abundances.csv"):
        shutil.copy(TEMPLATES / n, src / n)
    text = (src / "case.toml").read_text().replace('"CI", "CV", "H", "EH"', '"CI", "EH"')
    (src / "case.toml").write_text(text)
    for args, key in ((["fit", "case.toml", "--out", "fit"], "fit"),
                      (["star", "star_abundances.csv", "--out", "star", "--draws", "60"],
                       "star")):
        if not (src / key).exists():
            done = subprocess.run(PLANETMIX + args, cwd=src, capture_output=True, text=True)
            if done.returncode != 0:
                raise SystemExit(f"cannot make the {key} result: {done.stderr}")
        _RESULTS[key] = {p.name: p.read_bytes() for p in (src / key).iterdir()
                         if p.is_file()}


def _json_mutate(rng: random.Random, data: object) -> tuple[object, str]:
    """Replace one leaf (or container) of a JSON document."""
    paths: list[tuple] = []

    def walk(node: object, path: tuple) -> None:
        paths.append(path)
        if isinstance(node, dict):
            for k, v in node.items():
                walk(v, path + (k,))
        elif isinstance(node, list):
            for k, v in enumerate(node[:6]):
                walk(v, path + (k,))

    walk(data, ())
    path = rng.choice(paths[1:] or [()])
    new = rng.choice([None, "banana", -1, 1e308, [], {}, True, "NaN", [1, "x"],
                      {"median": "x"}, 0, "", -1e300])
    if not path:
        return new, "json:root"
    node = data
    for k in path[:-1]:
        node = node[k]
    if rng.random() < 0.2 and isinstance(node, dict):
        del node[path[-1]]
        return data, f"json:del:{path[0]}"
    node[path[-1]] = new
    return data, f"json:{path[0]}={type(new).__name__}"


def gen_result(rng: random.Random, kind: str) -> Ex:
    """pattern / fit_trend / report: a real result folder with one file mutated."""
    src = "star" if kind == "report" and rng.random() < 0.3 else "fit"
    files = dict(_RESULTS[src])
    target = "fit.json" if src == "fit" else "planet.json"
    if kind == "report" and rng.random() < 0.35:
        target = rng.choice(sorted(f for f in files if f.endswith((".csv", ".json"))))
    raw = files[target]
    r = rng.random()
    if r < 0.15:
        d, op = damage(rng, raw)
        files[target] = d
        return Ex(kind, files, target, f"{target}:{op}")
    if r < 0.25:
        d, op, exp = recode(rng, raw.decode())
        files[target] = d
        if op in ("cr-only", "trailing-ws") or "control" in op:
            exp = "pass"  # JSON and CSV read the same with CR line ends
        elif op == "only-comments" or exp == "":
            exp = "fail"
        return Ex(kind, files, target, f"{target}:enc:{op}", exp)
    if target.endswith(".json"):
        data, op = _json_mutate(rng, json.loads(raw))
        files[target] = json.dumps(data).encode()
        return Ex(kind, files, target, f"{target}:{op}")
    com, head, rows = csv_parts(raw.decode())
    i = rng.randrange(len(rows))
    j = rng.randrange(len(head))
    rows[i][j] = rng.choice(HOSTILE_NUMBERS + NOT_NUMBERS[:4])
    files[target] = csv_join(com, head, rows).encode()
    return Ex(kind, files, target, f"{target}:cell:{head[j]}")


# =========================================================================== library runs
def _finite(values) -> bool:
    return all(math.isfinite(float(v)) for v in values)


def load(ex: Ex, path: Path) -> tuple[bool, str]:
    """Run the example's door. Returns (the accepted content is sane, note)."""
    import components
    from inversion import batch, case, star

    if ex.kind == "target":
        comp, unc, _ = case.read_target(path, default_uncertainty_pct=10.0)
        tot = float(comp[[e for e in comp.index if e != "O"]].sum())
        ok = _finite(comp) and _finite(unc) and bool(((comp >= 0) & (comp <= 1)).all()) \
            and tot <= 1.05 and bool((unc >= 0).all())
        return ok, f"total {tot:.3g}"
    if ex.kind == "component":
        c = case._resolve_component(str(path), path.parent, str(path.parent / "case.toml"),
                                    "building_blocks.candidates")
        ok = (_finite(c.composition) and bool(((c.composition >= 0)
                                               & (c.composition <= 1)).all())
              and all(math.isfinite(v) and math.isfinite(s) and s > 0
                      for v, s in c.isotopes.values()) and c.name not in
              components.available())
        # the diagram's door reads the same file without the case's checks
        from inversion.diagram import resolve_composition

        d = resolve_composition(str(path))
        ok &= all(math.isfinite(v) and math.isfinite(s) and s > 0
                  for v, s in d.isotopes.values())
        return ok, "component"
    if ex.kind == "star":
        s = star.read_star_table(path)
        ok = all(math.isfinite(v) and abs(v) <= 3 for v in s.values.values()) and all(
            math.isfinite(v) and 0 <= v <= 3 for v in s.errors.values())
        return ok, "star"
    if ex.kind == "catalogue":
        rows, _ = batch.read_catalogue(path)
        ok = True
        for k, r in enumerate(rows):
            if r.star is None:
                continue
            ok &= all(math.isfinite(v) and abs(v) <= 3 for v in r.star.values.values())
            ok &= all(math.isfinite(v) and 0 <= v <= 3 for v in r.star.errors.values())
            if ex.expect == f"row{k}":
                ok = False
        if ex.expect.startswith("row"):
            ex.expect = ""  # the row-level expectation has been checked above
        return bool(ok), "catalogue"
    if ex.kind == "case":
        c = case.load_case(path)
        ok = _finite(c.target.composition) and _finite(c.target.uncertainty)
        ok &= math.isfinite(c.late_max_fraction) and 0 < c.late_max_fraction < 1
        ok &= all(math.isfinite(float(v)) and float(v) >= 0 for v in c.core.D.values())
        ok &= c.core.dIW is None or -10 <= c.core.dIW <= 5
        ok &= all(math.isfinite(a) and math.isfinite(b) and b > 0
                  for a, b in c.isotopes.values())
        pm = c.target.planet_mass_kg
        ok &= pm is None or (math.isfinite(pm) and pm > 0)
        return bool(ok), "case"
    if ex.kind == "pattern":
        p = star.read_pattern(path)
        return _finite(p.params), "pattern"
    if ex.kind == "fit_trend":
        from inversion.diagram import read_fit_trend

        t = read_fit_trend(path.parent)
        return _finite(t.params.values()), "trend"
    from inversion.report import build_report

    out = build_report(path.parent, out=path.parent.parent / "r.html")
    html = out.read_text(encoding="utf-8")
    return html.rstrip().endswith("</html>"), "report"


def run_library(work: Path, n: int, seed: int, kinds: list[str], tally: Tally) -> None:
    from components.exceptions import PlanetmixError

    weights = {"target": 16, "component": 16, "case": 20, "star": 12, "catalogue": 14,
               "pattern": 12, "fit_trend": 8, "report": 2}
    weights = {k: v for k, v in weights.items() if k in kinds}
    if {"pattern", "fit_trend", "report"} & set(weights):
        _result_folders(work)
    total = sum(weights.values())
    gens: dict[str, Callable[[random.Random], Ex]] = {
        "target": lambda g: gen_comp_table(g, "target"),
        "component": lambda g: gen_comp_table(g, "component"),
        "case": gen_case, "star": gen_star, "catalogue": gen_catalogue,
        "pattern": lambda g: gen_result(g, "pattern"),
        "fit_trend": lambda g: gen_result(g, "fit_trend"),
        "report": lambda g: gen_result(g, "report")}
    for kind, w in weights.items():
        rng = random.Random(f"{seed}-{kind}")
        folder = work / "lib" / kind / "in"
        for _ in range(max(1, round(n * w / total))):
            ex = gens[kind](rng)
            if folder.exists():
                shutil.rmtree(folder)
            folder.mkdir(parents=True)
            for fname, data in ex.files.items():
                (folder / fname).write_bytes(data)
            path = folder / ex.main
            cause = f"{kind} {ex.op}"
            tally.counts["inputs"] += 1
            try:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    sane, note = load(ex, path)
            except PlanetmixError as err:
                msg = str(err)
                if "\n" in msg or (str(folder) not in msg and kind != "report"):
                    tally.add("bad_message", cause, msg)
                if ex.expect == "pass":
                    tally.add("rejected_valid", cause, msg)
                else:
                    tally.add("error", cause, msg)
                continue
            except Exception as err:  # noqa: BLE001 - what escapes is the measurement
                tb = traceback.extract_tb(err.__traceback__)
                mine = [f for f in tb if re.search(r"/(inversion|components)/[^/]+\.py$",
                                                   f.filename)] or tb
                where = f"{Path(mine[-1].filename).name}:{mine[-1].lineno}"
                tally.add("traceback", f"{kind} {type(err).__name__} at {where}",
                          f"{ex.op}: {err!s}"[:300])
                continue
            if not sane:
                tally.add("garbage", cause, f"accepted content not sane ({note})")
            elif ex.expect == "fail":
                tally.add("garbage", cause, "planted invalid value accepted")
            else:
                tally.add("accepted", cause)


# =========================================================================== CLI runs
@dataclass
class Run:
    args: list[str]
    expect: str  # "fail", "pass" or ""
    op: str
    setup: Callable[[Path], None] | None = None
    timeout: float = 90.0


def _write(folder: Path, name: str, data: bytes | str) -> None:
    p = folder / name
    p.write_bytes(data.encode() if isinstance(data, str) else data)


def _clear(p: Path) -> None:
    if p.is_dir() and not p.is_symlink():
        shutil.rmtree(p)
    elif os.path.lexists(p):
        p.unlink()


def _fifo(folder: Path, name: str) -> None:
    _clear(folder / name)
    os.mkfifo(folder / name)


def _sparse(folder: Path, name: str) -> None:
    _clear(folder / name)
    with open(folder / name, "wb") as fh:
        fh.truncate(300 * 2 ** 20)  # 300 MiB of holes: above the declared input limit


def cli_runs(rng: random.Random, n: int) -> list[Run]:
    """The command-line plan: mutated files, hostile options, special files."""
    runs: list[Run] = []
    special = [("fifo", lambda f, nm: _fifo(f, nm)), ("devzero", None), ("dir", None),
               ("sparse", lambda f, nm: _sparse(f, nm)), ("missing", None),
               ("longname", None), ("urandom", None)]

    def special_path(kind: str, name: str) -> tuple[str, Callable[[Path], None] | None]:
        if kind == "fifo":
            return name, lambda f: _fifo(f, name)
        if kind == "sparse":
            return name, lambda f: _sparse(f, name)
        if kind == "devzero":
            return "/dev/zero", None
        if kind == "urandom":
            return "/dev/urandom", None
        if kind == "dir":
            return ".", None
        if kind == "missing":
            return "absent.csv", None
        return "z" * 300 + ".csv", None

    # 1. special files at every file argument
    slots = [("fit", lambda p: ["fit", p, "--out", "o"], "case.toml"),
             ("rank", lambda p: ["rank", p, "--out", "o", "--workers", "1"], "case.toml"),
             ("star", lambda p: ["star", p, "--out", "o", "--draws", "30"], "star.csv"),
             ("star-pattern", lambda p: ["star", "star.csv", "--out", "o", "--draws", "30",
                                         "--pattern", p], "fit.json"),
             ("batch", lambda p: ["batch", p, "--out", "o", "--workers", "1", "--draws",
                                  "30"], "catalog.csv"),
             ("diagram", lambda p: ["diagram", p, "--out", "d.svg"], "t.csv"),
             ("diagram-norm", lambda p: ["diagram", "BSE_MS95", "--normaliser", p,
                                         "--out", "d.svg"], "t.csv"),
             ("report", lambda p: ["report", p], "folder"),
             ("case-target", None, "target"), ("case-component", None, "component")]
    for name, make, fname in slots:
        for kind, _ in special:
            if name in ("case-target", "case-component"):
                p, setup0 = special_path(kind, "in.csv")
                key = "table" if name == "case-target" else "candidates"

                def setup(f: Path, p=p, key=key, setup0=setup0) -> None:
                    if setup0:
                        setup0(f)
                    t = (f / "case.toml").read_text()
                    if key == "table":
                        t = t.replace('table = "target.csv"', f'table = "{p}"')
                    else:
                        t = t.replace('"CI", "CV", "H", "EH"', f'"CI", "{p}"')
                    (f / "case.toml").write_text(t)

                runs.append(Run(["fit", "case.toml", "--out", "o"], "fail",
                                f"{name}:{kind}", setup))
                continue
            p, setup = special_path(kind, fname)
            if name == "report" and kind == "dir":
                p = "/"
            runs.append(Run(make(p), "fail", f"{name}:{kind}", setup))
    # 2. hostile options
    opts = [
        (["star", "star.csv", "--out", "o", "--draws", v], f"star --draws {v}")
        for v in ("0", "-5", "nan", "1e9", "2.5", "")] + [
        (["star", "star.csv", "--out", "o", "--seed", v], f"star --seed {v}")
        for v in ("-1", "1e3", "x", str(2 ** 70))] + [
        (["star", "star.csv", "--out", "o", "--dIW", v], f"star --dIW {v}")
        for v in ("-1000", "nan", "inf", "1e308", "6")] + [
        (["star", "star.csv", "--out", "o", "--mantle-FeO-wt", v], f"star --FeO {v}")
        for v in ("-5", "nan", "100", "0", "inf")] + [
        (["star", "star.csv", "--out", "o", "--planet-mass-kg", v], f"star --mass {v}")
        for v in ("0", "-1", "nan", "inf", "1e40")] + [
        (["star", "star.csv", "--out", "o", "--solar", v], f"star --solar {v}")
        for v in ("nosuch", "", "../x")] + [
        (["star", "star.csv", "--out", "o", "--star-id", v], f"star --star-id {v[:10]}")
        for v in ("", "a" * 5000, "x\ny")] + [
        (["batch", "catalog.csv", "--out", "o", "--workers", "1", "--partition-size", v],
         f"batch --partition-size {v}") for v in ("0", "-1", "nan", "1e12")] + [
        (["batch", "catalog.csv", "--out", "o", "--workers", v], f"batch --workers {v}")
        for v in ("0", "-2", "x")] + [
        (["batch", "catalog.csv", "--out", "o", "--workers", "1", "--draws", v],
         f"batch --draws {v}") for v in ("0", "-1")] + [
        (["batch", "catalog.csv", "--out", "o", "--workers", "1", "--seed", "-3"],
         "batch --seed -3"),
        (["batch", "catalog.csv", "--out", "o", "--resume", "--workers", "1"],
         "batch --resume fresh"),
        (["batch", "catalog.csv", "--out", "o", "--scheduler", "tcp://256.0.0.1:1"],
         "batch --scheduler bad")] + [
        (["rank", "case.toml", "--out", "o", "--workers", v], f"rank --workers {v}")
        for v in ("0", "-1", "x")] + [
        (["rank", "case.toml", "--out", "o", "--workers", "1", "--top", v],
         f"rank --top {v}") for v in ("-5", "0")] + [
        (["diagram", "BSE_MS95", "--out", v], f"diagram --out {v}")
        for v in ("d.txt", "d", "/proc/d.svg", "nosuchdir/d.svg", ".")] + [
        (["diagram", "BSE_MS95", "--out", "d.svg", "--reference", v],
         f"diagram --reference {v}") for v in ("Xx", "", "O", "Fe")] + [
        (["diagram", "BSE_MS95", "--out", "d.svg", "--width", v], f"diagram --width {v}")
        for v in ("triple", "")] + [
        (["diagram", "BSE_MS95", "--out", "d.svg", "--condensation-table", "mine"],
         "diagram --condensation-table mine"),
        (["diagram", "BSE_MS95", "--out", "d.svg", "--fit", "."], "diagram --fit ."),
        (["diagram", "NOPE", "--out", "d.svg"], "diagram NOPE"),
        (["diagram", "BSE_MS95", "--out", "d.svg", "--title", "$\\frac{$"],
         "diagram --title mathtext")] + [
        (["library", v], f"library {v[:12]}") for v in ("NOPE", "", "../CI", "ci",
                                                         "x" * 300, "elements ")] + [
        (["template", v, "--dir", "t"], f"template {v}") for v in ("nope", "")] + [
        (["template", "case", "--dir", "/dev/null"], "template --dir /dev/null"),
        (["fit", "case.toml", "--out", "case.toml"], "fit --out a file"),
        (["fit", "case.toml", "--out", "/proc/o"], "fit --out /proc"),
        (["fit", "case.toml", "--out", "/"], "fit --out /"),
        (["fit", "case.toml", "--out", ".."], "fit --out .."),
        (["fit", "case.toml"], "fit no --out"),
        (["fit", "--out", "o"], "fit no case"),
        (["fit", "case.toml", "--out", "o", "--bogus"], "fit --bogus"),
        (["nosuchcommand"], "unknown command"),
        ([], "no command"),
        (["report", "nosuch"], "report missing folder"),
        (["report", "."], "report foreign folder"),
        (["report", "fitres", "--out", "/proc/r.html"], "report --out /proc"),
        (["report", "fitres", "--out", "fitres"], "report --out a folder"),
        (["star", "star.csv", "--out", "o", "--pattern", "case.toml"],
         "star --pattern not JSON"),
        (["star", "star.csv", "--out", "o", "--dIW", "-2", "--mantle-FeO-wt", "8"],
         "star both iron settings"),
    ]
    for args, op in opts:
        expect = "fail"
        if op in ("star --seed 1e3",):
            expect = "fail"
        if op in ("star --dIW 6",):
            expect = "fail"
        if op in ("star --star-id x\ny", f"star --seed {2 ** 70}", "star --star-id aaaaaaaaaa",
                  "batch --resume fresh", "diagram --out nosuchdir/d.svg"):
            # valid or the project's choice: an id of any length or text, a seed numpy
            # takes, --resume with nothing to resume (runs all), --out in a new folder
            expect = ""
        runs.append(Run(args, expect, op))
    # 3. mutated input files through the commands (the library generators)
    gens = [("fit", lambda g: gen_case(g), lambda ex: ["fit", ex.main, "--out", "o"]),
            ("star", gen_star, lambda ex: ["star", ex.main, "--out", "o", "--draws", "30"]),
            ("batch", gen_catalogue, lambda ex: ["batch", ex.main, "--out", "o",
                                                "--workers", "1", "--draws", "30"]),
            ("diagram", lambda g: gen_comp_table(g, "component"),
             lambda ex: ["diagram", ex.main, "--out", "d.svg"]),
            ("diagram-target", lambda g: gen_comp_table(g, "target"),
             lambda ex: ["diagram", ex.main, "--out", "d.svg"]),
            ("star-pattern", lambda g: gen_result(g, "pattern"),
             lambda ex: ["star", "star.csv", "--out", "o", "--draws", "30", "--pattern",
                         "res/" + ex.main]),
            ("report", lambda g: gen_result(g, "report"), lambda ex: ["report", "res"])]
    k = 0
    while len(runs) < n:
        name, gen, make = gens[k % len(gens)]
        k += 1
        ex = gen(rng)
        if ex.expect.startswith("row"):
            ex.expect = ""  # a failed row still exits 0 (the row is listed as failed)
        sub = "res" if name in ("star-pattern", "report") else "."

        def setup(f: Path, ex=ex, sub=sub) -> None:
            d = f / sub
            d.mkdir(exist_ok=True)
            for fname, data in ex.files.items():
                (d / fname).write_bytes(data)

        if name == "fit":
            # a fit with two candidates is cheaper; the case is otherwise as generated
            files = dict(ex.files)
            files["case.toml"] = files["case.toml"].replace(b'"CI", "CV", "H", "EH"',
                                                            b'"CI", "EH"')
            ex.files = files
        runs.append(Run(make(ex), ex.expect, f"{name} {ex.op}", setup))
    rng.shuffle(runs)
    return runs[:n] if len(runs) > n else runs


def _base_folder(work: Path) -> Path:
    base = work / "cli_base"
    if base.exists():
        return base
    base.mkdir(parents=True)
    for n in ("case.toml", "target.csv", "component.csv", "catalog.csv"):
        shutil.copy(TEMPLATES / n, base / n)
    shutil.copy(TEMPLATES / "star_abundances.csv", base / "star.csv")
    shutil.copy(TEMPLATES / "target.csv", base / "t.csv")
    _result_folders(work)
    (base / "fitres").mkdir()
    for fname, data in _RESULTS["fit"].items():
        (base / "fitres" / fname).write_bytes(data)
    (base / "fit.json").write_bytes(_RESULTS["fit"]["fit.json"])
    (base / "folder").mkdir()
    return base


def classify_cli(run: Run, rc: int | None, err: str) -> tuple[str, str]:
    lines = [ln for ln in err.splitlines() if ln.strip() and "warning" not in ln.lower()
             and not ln.startswith(("stars:", "hypotheses:", "\r"))]
    if rc is None:
        return "traceback", "hang (time limit)"
    if "Traceback (most recent call last)" in err:
        last = [ln for ln in err.splitlines() if ln.strip()][-1]
        return "traceback", last.split(":")[0][:60]
    if rc == 2:
        errs = [ln for ln in lines if ln.startswith("planetmix: error:")]
        if len(errs) != 1 or len(lines) != 1:
            return "bad_message", f"{len(lines)} stderr lines"
        return ("rejected_valid" if run.expect == "pass" else "error"), ""
    if rc in (1, 3, 4):
        if rc == 1 and not any(ln.startswith("planetmix: failed:") for ln in lines):
            return "traceback", f"exit 1 without the project's message: {lines[-1:]}"
        return ("rejected_valid" if run.expect == "pass" else "error"), f"exit {rc}"
    if rc == 0:
        return ("garbage" if run.expect == "fail" else "accepted"), ""
    return "traceback", f"exit status {rc}"


def run_cli(work: Path, n: int, seed: int, tally: Tally, log: Callable[[str], None]) -> None:
    base = _base_folder(work)
    runs = cli_runs(random.Random(seed), n)
    for k, run in enumerate(runs):
        folder = work / "cli" / f"r{k % 2}"
        if folder.exists():
            shutil.rmtree(folder)
        shutil.copytree(base, folder)
        if run.setup:
            run.setup(folder)
        t0 = time.perf_counter()
        p = subprocess.Popen(PLANETMIX + run.args, cwd=folder, stdout=subprocess.DEVNULL,
                             stderr=subprocess.PIPE, start_new_session=True)
        try:
            err = p.communicate(timeout=run.timeout)[1].decode(errors="replace")
            rc: int | None = p.returncode
        except subprocess.TimeoutExpired:
            os.killpg(p.pid, signal.SIGKILL)
            err = p.communicate()[1].decode(errors="replace")
            rc = None
        cls, detail = classify_cli(run, rc, err)
        # no partial output on an error: --out absent, no temporary folder beside it
        if rc not in (0, None) and "--out" in run.args:
            out = run.args[run.args.index("--out") + 1]
            left = [q.name for q in folder.glob(".o.*")]
            if out == "o" and ((folder / "o").exists() and "batch" not in run.args
                               or left):
                cls, detail = "garbage", f"partial output left after exit {rc}: {left}"
        tally.counts["inputs"] += 1
        cause = f"{run.op}" if cls != "traceback" else f"{run.args[0] if run.args else '-'}:" \
            f" {detail}"
        tally.add(cls, cause, f"rc={rc} {detail} | {' '.join(run.args)[:120]} | "
                  f"{err.strip()[-300:]}")
        log(f"[{k + 1}/{len(runs)}] {cls:14s} rc={rc} {time.perf_counter() - t0:5.1f}s "
            f"{run.op[:70]}")


# =========================================================================== main
def summary(tally: Tally, title: str) -> str:
    c = tally.counts
    out = [f"{title}: inputs {c['inputs']}, errors {c['error']}, accepted {c['accepted']}, "
           f"tracebacks {c['traceback']} ({len(tally.causes['traceback'])} causes), "
           f"garbage {c['garbage']} ({len(tally.causes['garbage'])} causes), rejected valid "
           f"{c['rejected_valid']}, bad messages {c['bad_message']}"]
    for cls in ("traceback", "garbage", "rejected_valid", "bad_message"):
        for cause, cnt in tally.causes[cls].most_common():
            out.append(f"    {cls}: {cnt} x {cause}")
    return "\n".join(out)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--inputs", type=int, default=10000, help="library-level inputs")
    ap.add_argument("--cli", type=int, default=320, help="command-line runs")
    ap.add_argument("--seed", type=int, default=2026)
    ap.add_argument("--only", default="", help="library kinds, comma-separated")
    ap.add_argument("--show", type=int, default=2, help="samples printed per cause class")
    ap.add_argument("--json", default=None, help="write counts and causes here")
    ap.add_argument("--work", default=None, help="work folder (default: a temporary one)")
    ap.add_argument("--src", default=None, help="source tree to measure (default: the "
                    "installed one), e.g. an unpacked 'git archive' of an earlier commit")
    args = ap.parse_args(argv)
    kinds = [k for k in (args.only.split(",") if args.only else
                         ["target", "component", "case", "star", "catalogue", "pattern",
                          "fit_trend", "report"])]
    work = Path(args.work) if args.work else Path(tempfile.mkdtemp(prefix="pm-fuzz-"))
    work.mkdir(parents=True, exist_ok=True)
    if args.src:
        src = str(Path(args.src).resolve())
        sys.path.insert(0, src)
        os.environ["PYTHONPATH"] = src + os.pathsep + os.environ.get("PYTHONPATH", "")
        PLANETMIX[:] = [sys.executable, "-c", "import sys; from inversion.cli import main; "
                        "sys.exit(main())"]
    lib, cli = Tally(), Tally()
    t0 = time.perf_counter()
    if args.inputs:
        run_library(work, args.inputs, args.seed, kinds, lib)
        print(summary(lib, f"library ({time.perf_counter() - t0:.0f} s)"), flush=True)
    if args.cli:
        t1 = time.perf_counter()
        run_cli(work, args.cli, args.seed, cli, lambda s: print(s, flush=True))
        print(summary(cli, f"command line ({time.perf_counter() - t1:.0f} s)"), flush=True)
    for t, name in ((lib, "library"), (cli, "command line")):
        for cls in ("traceback", "garbage", "rejected_valid", "bad_message"):
            for s in t.samples[cls][:args.show * 20]:
                print(f"  [{name} {cls}] {s}")
    if args.json:
        Path(args.json).write_text(json.dumps(
            {name: {"counts": dict(t.counts),
                    "causes": {k: dict(v) for k, v in t.causes.items()},
                    "samples": {k: v[:50] for k, v in t.samples.items()}}
             for name, t in (("library", lib), ("cli", cli))}, indent=1))
    if not args.work:
        shutil.rmtree(work, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
