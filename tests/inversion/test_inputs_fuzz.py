"""Mutation fuzzing of every input door: target CSV, component CSV, case TOML, star CSV,
catalogue CSV, and a fit result read back (fit.json and residuals.csv, as
``star --pattern`` and ``diagram --fit`` read them).

Each example starts from a template of ``inversion/templates`` and applies one mutation.
Some mutations plant a value known to be invalid (``must_fail``: 1e30 wt%, ``MgO2``,
[Fe/H] = -400, a wrong TOML type, a short catalogue row...), some keep the input valid
(``must_pass``: a byte-order mark, blank lines, a valid dIW), the rest are random
byte-level damage with no expected outcome. The loaders are called directly (validation
only, no fit). Checked for every example: only the project's errors escape; every
message is one line and names the file; a planted value's message names the field or
row; an accepted input holds finite values only; a ``must_fail`` input is never
accepted and a ``must_pass`` input never rejected.

``python tests/inversion/test_inputs_fuzz.py [N]`` prints the counts of a run of N
examples per kind (the numbers in the issue report).
"""

from __future__ import annotations

import gzip
import math
import random
import re
import sys
import traceback
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pytest

TEMPLATES = Path(__file__).resolve().parents[2] / "inversion" / "templates"

#: Examples per input kind in ``make test`` (6 kinds: 2,400 in total).
FAST_PER_KIND = 400
#: Examples per input kind behind ``-m slow``.
SLOW_PER_KIND = 4000


@dataclass
class Example:
    """One generated input: its bytes, the mutation, and what must happen."""

    kind: str
    data: bytes
    mutation: str
    must_fail: bool = False
    must_pass: bool = False
    planted: bool = False  # a value was planted in a field: the message must name it
    bad_row: int | None = None  # catalogue: the data row (2-based) that must be 'failed'
    extra: dict[str, bytes] = field(default_factory=dict)  # further files beside it


@dataclass
class Tally:
    """Counts of one fuzz run."""

    inputs: int = 0
    project_errors: int = 0
    accepted: int = 0
    tracebacks: Counter = field(default_factory=Counter)
    accepted_invalid: Counter = field(default_factory=Counter)
    rejected_valid: Counter = field(default_factory=Counter)
    bad_messages: Counter = field(default_factory=Counter)

    def line(self) -> str:
        return (f"inputs {self.inputs}, project errors {self.project_errors}, accepted "
                f"{self.accepted}, tracebacks {sum(self.tracebacks.values())} "
                f"({len(self.tracebacks)} causes), accepted invalid "
                f"{sum(self.accepted_invalid.values())} ({len(self.accepted_invalid)} "
                f"causes), rejected valid {sum(self.rejected_valid.values())}, bad messages "
                f"{sum(self.bad_messages.values())}")


# --------------------------------------------------------------------------- generators
def _template(name: str) -> str:
    return (TEMPLATES / name).read_text(encoding="utf-8")


def _split(text: str) -> tuple[list[str], list[str], list[list[str]]]:
    """Comment lines, header, data rows of a simple CSV template (no quoting)."""
    lines = text.splitlines()
    comments = [ln for ln in lines if ln.startswith("#")]
    body = [ln for ln in lines if ln.strip() and not ln.startswith("#")]
    return comments, body[0].split(","), [ln.split(",") for ln in body[1:]]


def _join(comments: list[str], header: list[str], rows: list[list[str]]) -> str:
    return "\n".join(comments + [",".join(header)] + [",".join(r) for r in rows]) + "\n"


BAD_NUMBERS = ["1e30", "1e300", "-1", "nan", "inf", "-inf", "abc", "0x1p3", "1..2"]
BAD_SPECIES = ["FeO0", "Si0O2", "MgO2", "SiO5", "Ca2O", "Xx", "Fe1O1", "NaCl", "mgo", "O2Fe"]


def _byte_damage(rng: random.Random, data: bytes) -> tuple[bytes, str]:
    """Random damage with no expected outcome."""
    op = rng.choice(["flip", "delete", "insert", "cut", "dupe", "swap"])
    b = bytearray(data)
    i = rng.randrange(len(b))
    if op == "flip":
        b[i] = rng.randrange(256)
    elif op == "delete":
        del b[i:i + rng.randint(1, 8)]
    elif op == "insert":
        b[i:i] = bytes(rng.choice([b",", b"\n", b"#", b'"', b" ", b"e", b"-", b"\t", b"9"]))
    elif op == "cut":
        del b[i:]
    elif op == "dupe":
        j = rng.randrange(len(b))
        b[i:i] = data[min(i, j):max(i, j)][:200]
    else:
        j = rng.randrange(len(b))
        b[i], b[j] = b[j], b[i]
    return bytes(b) or b"x", f"bytes:{op}"


def _encoding_mutation(rng: random.Random, text: str) -> tuple[bytes, str, bool, bool]:
    """(data, name, must_fail, must_pass) for an encoding change of a valid text."""
    op = rng.choice(["bom", "utf16", "latin1", "gzip", "blank", "crlf"])
    if op == "bom":
        return b"\xef\xbb\xbf" + text.encode(), "enc:bom", False, True
    if op == "utf16":
        return text.encode("utf-16"), "enc:utf16", True, False
    if op == "latin1":
        return (text.replace("\n", " # caf\u00e9\n", 1) if text.startswith("#")
                else "# r\u00e9sum\u00e9\n" + text).encode("latin-1"), "enc:latin1", True, False
    if op == "gzip":
        return gzip.compress(text.encode()), "enc:gzip", True, False
    if op == "blank":
        lines = text.splitlines()
        k = rng.randrange(1, len(lines) + 1)
        return ("\n".join(lines[:k] + ["", "   "] + lines[k:]) + "\n").encode(), \
            "enc:blank-lines", False, True
    return text.replace("\n", "\r\n").encode(), "enc:crlf", False, True


def gen_table(rng: random.Random, kind: str) -> Example:
    """Target, component or star table."""
    name = {"target": "target.csv", "component": "component.csv",
            "star": "star_abundances.csv"}[kind]
    text = _template(name)
    comments, header, rows = _split(text)
    r = rng.random()
    if r < 0.2:
        data, m = _byte_damage(rng, text.encode())
        return Example(kind, data, m)
    if r < 0.35:
        data, m, mf, mp = _encoding_mutation(rng, text)
        return Example(kind, data, m, must_fail=mf, must_pass=mp)
    rows = [list(x) for x in rows]
    i = rng.randrange(len(rows))
    op = rng.choice(["value", "unc", "species", "dupe", "comma+", "comma-", "header",
                     "unit"] + (["name", "iso"] if kind == "component" else []))
    if op == "value":
        if kind == "star":
            pool = [v for v in BAD_NUMBERS if v != "-1"] + ["-400", "400", "3.5", "-3.5"]
        else:
            pool = BAD_NUMBERS + (["150"] if rows[i][header.index("unit")] == "wt%" else [])
        rows[i][header.index("value")] = rng.choice(pool)
        return Example(kind, _join(comments, header, rows).encode(), "value", True,
                       planted=True)
    if op == "unc":
        col = [c for c in header if c.startswith("uncertainty")][0]
        pool = ["-1", "nan", "inf", "abc", "1e300"] + (["5"] if kind == "star" else [])
        rows[i][header.index(col)] = rng.choice(pool)
        return Example(kind, _join(comments, header, rows).encode(), "uncertainty", True,
                       planted=True)
    if op == "species":
        rows[i][0] = rng.choice(BAD_SPECIES)
        return Example(kind, _join(comments, header, rows).encode(), "species", True,
                       planted=True)
    if op == "dupe":
        rows.insert(rng.randrange(len(rows) + 1), list(rows[i]))
        return Example(kind, _join(comments, header, rows).encode(), "duplicate row", True)
    if op == "comma+":
        rows[i].append("")
        return Example(kind, _join(comments, header, rows).encode(), "extra field", True)
    if op == "comma-":
        del rows[i][rng.randrange(1, len(rows[i]))]
        # a short row may only lose an optional trailing cell; the value must then be
        # missing or shifted: treated as no expectation when the lost cell was the last
        last = len(rows[i]) == len(header) - 1
        return Example(kind, _join(comments, header, rows).encode(), "short row",
                       must_fail=not last or kind != "star")
    if op == "header":
        header = list(header)
        header[rng.randrange(len(header))] = rng.choice(["", "value", "x y", "element"])
        return Example(kind, _join(comments, header, rows).encode(), "header")
    if op == "unit":
        if "unit" not in header:
            return Example(kind, text.encode(), "control", must_pass=True)
        rows[i][header.index("unit")] = rng.choice(["furlongs", "", "wt", "%%", "ppt"])
        return Example(kind, _join(comments, header, rows).encode(), "unit", True,
                       planted=True)
    if op == "name":
        comments = [f"# name: {rng.choice(['CI', 'CV', 'EH', 'BSE_MS95'])}"] + [
            c for c in comments if not c.startswith("# name:")]
        return Example(kind, _join(comments, header, rows).encode(), "library name", True)
    # isotope header with a non-finite value or a non-positive sigma
    bad = rng.choice(["inf 0.1", "0.1 -1", "nan 0.1", "0.1 0", "1e300 0.1", "0.1 inf"])
    comments = comments + [f"# e54Cr: {bad}"]
    return Example(kind, _join(comments, header, rows).encode(), "isotope header", True)


def gen_catalogue(rng: random.Random) -> Example:
    text = _template("catalog.csv")
    comments, header, rows = _split(text)
    rows = [list(x) for x in rows]
    r = rng.random()
    if r < 0.2:
        data, m = _byte_damage(rng, text.encode())
        return Example("catalogue", data, m)
    if r < 0.35:
        data, m, mf, mp = _encoding_mutation(rng, text)
        return Example("catalogue", data, m, must_fail=mf, must_pass=mp)
    i = rng.randrange(len(rows))
    op = rng.choice(["value", "err", "comma+", "comma-", "cut"])
    cols = [j for j, c in enumerate(header) if c != "star_id"]
    j = rng.choice(cols)
    if op == "value" and not header[j].endswith("_err"):
        # ("nan" and an empty cell mean "not measured" in a catalogue; -1 is valid)
        rows[i][j] = rng.choice([v for v in BAD_NUMBERS if v not in ("nan", "-1")]
                                + ["-400", "400", "3.5"])
        if rows[i][j + 1] == "":
            rows[i][j + 1] = "0.05"
        return Example("catalogue", _join(comments, header, rows).encode(), "row value",
                       False, bad_row=i + 2)
    if op in ("value", "err"):
        jj = j if header[j].endswith("_err") else j + 1
        if rows[i][jj - 1] == "":
            rows[i][jj - 1] = "0.1"
        rows[i][jj] = rng.choice(["-1", "nan", "inf", "abc", "1e300", "5"])
        return Example("catalogue", _join(comments, header, rows).encode(), "row sigma",
                       False, bad_row=i + 2)
    if op == "comma+":
        rows[i].append("")
        return Example("catalogue", _join(comments, header, rows).encode(), "row extra",
                       False, bad_row=i + 2)
    if op == "comma-":
        del rows[i][rng.randrange(1, len(rows[i]))]
        return Example("catalogue", _join(comments, header, rows).encode(), "row short",
                       False, bad_row=i + 2)
    # a file cut in its last row, losing at least one separator
    body = _join(comments, header, rows)
    last_start = body.rstrip("\n").rfind("\n") + 1
    last = body[last_start:]
    commas = [k for k, ch in enumerate(last) if ch == ","]
    k = rng.choice(commas)
    return Example("catalogue", body[:last_start + k].encode(), "cut mid-row", False,
                   bad_row=len(rows) + 1)


TOML_BAD_ANY = ["true", "{}", "[[1]]", "nan", "inf", "-inf", "1e308", "-1e308", "-2.5"]
TOML_BAD_STR = ['"banana"', '"/etc"', '"./"', '"' + "x" * 300 + '.csv"', '"CI\\u0000"']


def _case_base() -> str:
    """The case template without its [sampler] section (checked by the sampler itself)."""
    out, skip = [], False
    for ln in _template("case.toml").splitlines():
        if ln.startswith("["):
            skip = ln.strip() == "[sampler]"
        if not skip:
            out.append(ln)
    return "\n".join(out) + "\n"


def _in_section(text: str, section: str, line: str) -> str:
    lines = text.splitlines()
    k = lines.index(f"[{section}]")
    return "\n".join(lines[:k + 1] + [line] + lines[k + 1:]) + "\n"


def gen_case(rng: random.Random) -> Example:
    text = _case_base()
    extra = {"target.csv": _template("target.csv").encode(),
             "component.csv": _template("component.csv").encode()}
    r = rng.random()
    if r < 0.15:
        data, m = _byte_damage(rng, text.encode())
        return Example("case", data, m, extra=extra)
    if r < 0.25:
        data, m, mf, mp = _encoding_mutation(rng, text)
        return Example("case", data, m, must_fail=mf, must_pass=mp, extra=extra)
    if r < 0.6:
        lines = text.splitlines()
        keyed = [k for k, ln in enumerate(lines) if re.match(r"^[A-Za-z0-9_]+ = ", ln)]
        k = rng.choice(keyed)
        key = lines[k].split(" = ")[0]
        pool = TOML_BAD_ANY + ([] if key == "title" else TOML_BAD_STR)
        lines[k] = f"{key} = {rng.choice(pool)}"
        return Example("case", ("\n".join(lines) + "\n").encode(), f"toml:{key}", True,
                       planted=True, extra=extra)
    bad = [
        ("core.D", "O = 2.0"), ("core.D", "Mg = 1.0"), ("core.D", "Fe = 3.0"),
        ("core.D", "Xe = 1.0"), ("core.D", "Co = -1"), ("target", "minimum_uncertainty_dex = -1"),
        ("target", "minimum_uncertainty_dex = true"),
        ("target", 'minimum_uncertainty_dex = "banana"'),
        ("target", "minimum_uncertainty_dex = nan"), ("target", "mantle_mass_kg = 6.0e24"),
        ("target", "mantle_mass_kg = 5.972e24"), ("late_accretion", "max_fraction = 2"),
        ("isotopes", "e48Ca = [nan, 0.1]"), ("isotopes", "e48Ca = [0, inf]"),
        ("isotopes", "e48Ca = [0, -1]"), ("isotopes", "e48Ca = [1, 2, 3]"),
        ("isotopes", "D17O = [1e300, 0.1]"),
    ]
    good = [("target", "minimum_uncertainty_dex = 0.05"), ("late_accretion", "max_fraction = 0.1"),
            ("target", "mantle_mass_kg = 4.0e24"), ("core.D", "Co = 30.0"),
            ("isotopes", "e48Ca = [0.5, 0.3]")]
    op = rng.random()
    if op < 0.55:
        sec, line = rng.choice(bad)
        if sec == "late_accretion":
            text = text.replace("max_fraction = 0.05\n", "")
        return Example("case", _in_section(text, sec, line).encode(), f"add:{line}", True,
                       planted=True, extra=extra)
    if op < 0.65:
        diw = rng.choice(["-1000", "1e308", "6", "-11"])
        return Example("case", text.replace("mantle_FeO_wt = 8.05", f"dIW = {diw}").encode(),
                       f"dIW = {diw}", True, planted=True, extra=extra)
    if op < 0.7:
        deep = "x = " + "[" * 3000 + "]" * 3000 + "\n"
        return Example("case", (deep + text).encode(), "deep nesting", True, extra=extra)
    if op < 0.75:
        pri = rng.choice(["[priors]\ntau = -2.5\n", "[priors.tau]\ndist = [1, 2]\n",
                          "priors = -2.5\n"])
        return Example("case", (text + pri).encode() if pri.startswith("[")
                       else (pri + text).encode(), f"priors:{pri.strip()}", True, extra=extra)
    if op < 0.8:
        named = extra["component.csv"].replace(b"# name: MyBlock", b"# name: CI")
        t = text.replace('candidates = ["CI", "CV", "H", "EH"]',
                         'candidates = ["CI", "component.csv"]')
        return Example("case", t.encode(), "component named CI", True,
                       extra={**extra, "component.csv": named})
    if op < 0.85:
        t = text.replace('table = "target.csv"', 'table = "./"')
        return Example("case", t.encode(), "target is a folder", True, extra=extra)
    sec, line = rng.choice(good)
    if sec == "late_accretion":
        text = text.replace("max_fraction = 0.05\n", "")
    if sec == "isotopes":
        pass
    return Example("case", _in_section(text, sec, line).encode(), f"valid:{line}",
                   must_pass=True, extra=extra)


RESULT_FIT = {"title": "fuzz", "status": "optimal",
              "volatility": {"form": "kinked", "T0": 1380.0, "slope": 0.002},
              "normaliser": "CI",
              "provenance": {"reference_element": "Mg", "condensation_table": "lodders2003"}}
RESULT_RESIDUALS = ("element,tc50,observed,model,sigma\nMg,1336.0,0.0,0.0,0.05\n"
                    "Na,958.0,-0.8,-0.75,0.1\nZn,726.0,,-1.4,\n")


def gen_result(rng: random.Random) -> Example:
    """A fit result read back (``star --pattern``, ``diagram --fit``): fit.json and
    residuals.csv of a result folder, one of them damaged or edited."""
    import json

    text = json.dumps(RESULT_FIT, indent=1)
    extra = {"residuals.csv": RESULT_RESIDUALS.encode()}
    r = rng.random()
    if r < 0.2:
        data, m = _byte_damage(rng, text.encode())
        return Example("result", data, m, extra=extra)
    if r < 0.3:
        data, m, mf, mp = _encoding_mutation(rng, text)
        if m == "enc:blank-lines":
            mp = True
        return Example("result", data, m, must_fail=mf, must_pass=mp, extra=extra)
    if r < 0.45:
        cell = rng.choice(["inf", "-inf", "abc", "1e999", "nan1"])
        col = rng.choice(["tc50", "model"])
        lines = RESULT_RESIDUALS.splitlines()
        i = rng.randrange(1, len(lines))
        cells = lines[i].split(",")
        cells[["element", "tc50", "observed", "model", "sigma"].index(col)] = cell
        lines[i] = ",".join(cells)
        return Example("result", text.encode(), f"residuals:{col}", True, planted=True,
                       extra={"residuals.csv": ("\n".join(lines) + "\n").encode()})
    data = json.loads(text)
    key = rng.choice(["T0", "slope", "form", "volatility", "root", "provenance"])
    bad = rng.choice([None, "banana", True, [], {}, "NaN", 1e999, [1, 2]])
    if key == "root":
        data = bad
    elif key == "volatility":
        data["volatility"] = bad
    elif key == "provenance":
        data["provenance"] = bad
        # provenance is informational: read with its defaults, no expectation
        return Example("result", json.dumps(data).encode(), "json:provenance", extra=extra)
    else:
        data["volatility"][key] = bad
    return Example("result", json.dumps(data).encode(), f"json:{key}", True, planted=True,
                   extra=extra)


# --------------------------------------------------------------------------- checking
def _finite_series(*series) -> bool:
    return all(all(math.isfinite(float(v)) for v in s) for s in series)


def _load(ex: Example, path: Path) -> tuple[bool, str]:
    """Run the loader; returns (accepted values are sane, description)."""
    import components
    from inversion import batch, case, star

    if ex.kind == "target":
        comp, unc, _ = case.read_target(path, default_uncertainty_pct=10.0)
        ok = _finite_series(comp, unc) and bool(((comp >= 0) & (comp <= 1)).all())
        return ok, "target values"
    if ex.kind == "component":
        c = case._resolve_component(str(path), path.parent, str(path.parent / "case.toml"),
                                    "building_blocks.candidates")
        ok = (_finite_series(c.composition) and bool(((c.composition >= 0)
                                                      & (c.composition <= 1)).all())
              and all(math.isfinite(v) and math.isfinite(s) and s > 0
                      for v, s in c.isotopes.values())
              and c.name not in components.available())
        return ok, "component values"
    if ex.kind == "star":
        s = star.read_star_table(path)
        ok = all(math.isfinite(v) and abs(v) <= 3 for v in s.values.values()) and all(
            math.isfinite(v) and 0 <= v <= 3 for v in s.errors.values())
        return ok, "star values"
    if ex.kind == "catalogue":
        rows, _ = batch.read_catalogue(path)
        ok = True
        for r in rows:
            if r.star is None:
                continue
            ok &= all(math.isfinite(v) and abs(v) <= 3 for v in r.star.values.values())
            ok &= all(math.isfinite(v) and 0 <= v <= 3 for v in r.star.errors.values())
            if ex.bad_row is not None and r.row == ex.bad_row:
                ok = False
        return ok, "catalogue rows"
    if ex.kind == "result":
        from inversion.diagram import read_fit_trend

        p = star.read_pattern(path)
        t = read_fit_trend(path.parent)
        ok = all(math.isfinite(v) for v in p.params) and all(
            math.isfinite(v) for v in t.params.values())
        ok &= bool(t.model[["tc50", "model"]].apply(
            lambda c: c.isna() | c.abs().lt(float("inf"))).all().all())
        return ok, "result values"
    c = case.load_case(path)
    vals = [c.target.composition, c.target.uncertainty]
    ok = _finite_series(*vals) and math.isfinite(c.late_max_fraction) and 0 < \
        c.late_max_fraction < 1
    ok &= all(math.isfinite(float(v)) for v in c.core.D.values())
    ok &= c.core.dIW is None or -10 <= c.core.dIW <= 5
    ok &= all(math.isfinite(a) and math.isfinite(b) and b > 0 for a, b in c.isotopes.values())
    for comp in c.candidates:
        ok &= _finite_series(comp.composition)
    return bool(ok), "case values"


def check_example(ex: Example, folder: Path, tally: Tally) -> None:
    """Write the example's files into ``folder``, load it, count the outcome."""
    from components.exceptions import PlanetmixError

    name = {"target": "target.csv", "component": "component.csv", "case": "case.toml",
            "star": "star.csv", "catalogue": "catalog.csv", "result": "fit.json"}[ex.kind]
    for f in folder.iterdir():
        if f.is_file():
            f.unlink()
    for fname, data in ex.extra.items():
        (folder / fname).write_bytes(data)
    path = folder / name
    path.write_bytes(ex.data)
    tally.inputs += 1
    cause = ex.mutation.split(":")[0] + ":" + ex.mutation.split(":")[-1][:40]
    try:
        sane, what = _load(ex, path)
    except PlanetmixError as err:
        tally.project_errors += 1
        msg = str(err)
        if "\n" in msg:
            tally.bad_messages["multi-line"] += 1
        if str(folder) not in msg:
            tally.bad_messages[f"no file named: {ex.kind} {cause}"] += 1
        if ex.planted and getattr(err, "field", None) is None and getattr(
                err, "row", None) is None:
            tally.bad_messages[f"no field or row: {ex.kind} {cause}"] += 1
        if ex.must_pass:
            tally.rejected_valid[f"{ex.kind} {cause}: {msg[-120:]}"] += 1
        return
    except RecursionError:
        tally.tracebacks[f"{ex.kind}: RecursionError"] += 1
        return
    except Exception as err:  # noqa: BLE001 - counting what escapes is the point
        tb = traceback.extract_tb(err.__traceback__)[-1]
        tally.tracebacks[f"{ex.kind}: {type(err).__name__} at {Path(tb.filename).name}:"
                         f"{tb.lineno}"] += 1
        return
    tally.accepted += 1
    if not sane:
        tally.accepted_invalid[f"{ex.kind} {cause}: non-finite or out-of-range {what}"] += 1
    elif ex.must_fail:
        tally.accepted_invalid[f"{ex.kind} {cause}"] += 1


GENERATORS: dict[str, Callable[[random.Random], Example]] = {
    "target": lambda rng: gen_table(rng, "target"),
    "component": lambda rng: gen_table(rng, "component"),
    "star": lambda rng: gen_table(rng, "star"),
    "catalogue": gen_catalogue,
    "case": gen_case,
    "result": gen_result,
}


def run_fuzz(folder: Path, per_kind: int, seed: int = 17) -> dict[str, Tally]:
    """Generate and check ``per_kind`` examples of every input kind."""
    import warnings

    out = {}
    for k, (kind, gen) in enumerate(GENERATORS.items()):
        rng = random.Random(seed * 1000 + k)
        tally = Tally()
        work = folder / kind
        work.mkdir(parents=True, exist_ok=True)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            for _ in range(per_kind):
                check_example(gen(rng), work, tally)
        out[kind] = tally
    return out


def _assert_clean(tallies: dict[str, Tally]) -> None:
    problems = {k: (dict(t.tracebacks), dict(t.accepted_invalid), dict(t.rejected_valid),
                    dict(t.bad_messages)) for k, t in tallies.items()
                if t.tracebacks or t.accepted_invalid or t.rejected_valid or t.bad_messages}
    assert not problems, problems
    # the generators reach both outcomes for every kind (a fuzz that only rejects, or only
    # accepts, tests nothing)
    for kind, t in tallies.items():
        assert t.project_errors > 0 and t.accepted > 0, (kind, t.line())


def test_fuzz_every_input_door(tmp_path: Path) -> None:
    tallies = run_fuzz(tmp_path, FAST_PER_KIND)
    assert sum(t.inputs for t in tallies.values()) >= 2000
    _assert_clean(tallies)


@pytest.mark.slow
def test_fuzz_every_input_door_long(tmp_path: Path) -> None:
    tallies = run_fuzz(tmp_path, SLOW_PER_KIND, seed=29)
    _assert_clean(tallies)


# --------------------------------------------------------------------------- focused
# One test per class the outside campaign (benchmarks/fuzz_inputs.py) found; each names
# the class in its docstring.
def _component(tmp_path: Path, header: str, name: str = "c.csv") -> Path:
    text = _template("component.csv").replace("# e54Cr: 1.56 0.06", header)
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


@pytest.mark.parametrize("header", ["# e54Cr: 1.56 0.06\n# e54Cr: 9 9",
                                    "# e54Cr: inf 0.06", "# e54Cr: 1.56 -0.06",
                                    "# e54Cr: 1.56 0.06\n# name: CI"])
def test_component_headers_checked_at_every_door(tmp_path: Path, header: str) -> None:
    """Class: a repeated header key (the later value silently won) and non-finite or
    negative isotope headers, refused for the case door and for the diagram's door
    (which read the file without the case's checks); a user file named like a library
    table is refused by the diagram too."""
    from components.exceptions import InputError
    from inversion import case
    from inversion.diagram import resolve_composition

    path = _component(tmp_path, header)
    with pytest.raises(InputError) as err:
        resolve_composition(str(path))
    assert str(path) in str(err.value) and err.value.field in ("e54Cr", "name")
    with pytest.raises(InputError):
        case._resolve_component(str(path), tmp_path, "case.toml", "candidates")


def test_library_isotope_table_is_range_checked(tmp_path: Path,
                                                monkeypatch: pytest.MonkeyPatch) -> None:
    """Class: library isotope values were trusted; a damaged value gives the project's
    error naming row and field."""
    import components
    from components import _library
    from components.exceptions import InputError

    src = _library.DATA_DIR / "isotopes.csv"
    lines = src.read_text(encoding="utf-8").splitlines()
    head = next(k for k, ln in enumerate(lines) if ln.startswith("body"))
    cols = lines[head].split(",")
    cells = lines[head + 1].split(",")
    cells[cols.index("value")] = "1e9"
    lines[head + 1] = ",".join(cells)
    (tmp_path / "isotopes.csv").write_text("\n".join(lines) + "\n", encoding="utf-8")
    assert len(components.isotopes()) > 10  # the real table passes
    monkeypatch.setattr(_library, "DATA_DIR", tmp_path)
    _library.isotopes.cache_clear()
    try:
        with pytest.raises(InputError) as err:
            components.isotopes()
    finally:
        _library.isotopes.cache_clear()  # the real table again for the other tests
    assert err.value.field == "value" and err.value.row == 2


@pytest.mark.parametrize("cell,ok", [("1_000", False), ("\uff11\uff12", False),
                                     ("0x10", False), ("4.5E1", True), ("+45.0", True),
                                     (" 45 ", True)])
def test_table_numbers_are_plain_decimals(tmp_path: Path, cell: str, ok: bool) -> None:
    """Class: Python's float() took "1_000" and full-width digits as numbers."""
    from components.exceptions import InputError
    from inversion import case

    comments, header, rows = _split(_template("target.csv"))
    rows[0][header.index("value")] = f'"{cell}"'
    path = tmp_path / "t.csv"
    path.write_text(_join(comments, header, rows), encoding="utf-8")
    if ok:
        comp, _, _ = case.read_target(path, default_uncertainty_pct=10)
        assert comp.iloc[0] == pytest.approx(0.45 * 28.0855 / 60.0843, rel=1e-3)  # SiO2
    else:
        with pytest.raises(InputError) as err:
            case.read_target(path, default_uncertainty_pct=10)
        assert err.value.field == "value" and err.value.row == 2


@pytest.mark.parametrize("line,ok", [('chains = "banana"', False), ("draws = 1e308", False),
                                     ("seed = true", False), ("target_accept = 2", False),
                                     ("tune = 0", True)])
def test_sampler_settings_are_checked_when_the_case_is_read(tmp_path: Path, line: str,
                                                            ok: bool) -> None:
    """Class: [sampler] values of the wrong kind were accepted by every command but
    ``sample``."""
    from components.exceptions import InputError
    from inversion.case import load_case

    for name in ("target.csv",):
        (tmp_path / name).write_text(_template(name), encoding="utf-8")
    key = line.split(" = ")[0]
    text = "\n".join(ln for ln in _template("case.toml").splitlines()
                     if not ln.startswith(key + " ="))
    path = tmp_path / "case.toml"
    path.write_text(text.replace("[sampler]\n", f"[sampler]\n{line}\n"), encoding="utf-8")
    if ok:
        assert load_case(path).sampler[key] == 0
    else:
        with pytest.raises(InputError) as err:
            load_case(path)
        assert key in str(err.value.field)


def _fit_folder(tmp_path: Path) -> Path:
    import json

    folder = tmp_path / "fit"
    folder.mkdir()
    (folder / "fit.json").write_text(json.dumps(RESULT_FIT), encoding="utf-8")
    (folder / "residuals.csv").write_text(RESULT_RESIDUALS, encoding="utf-8")
    return folder


@pytest.mark.parametrize("damage", ["bytes", "json", "param", "residual", "bom"])
def test_fit_result_read_back_goes_through_the_door(tmp_path: Path, damage: str) -> None:
    """Class: ``diagram --fit`` read fit.json with a bare json.loads (UnicodeDecodeError,
    JSONDecodeError, TypeError tracebacks); a BOM is accepted."""
    import json

    from components.exceptions import InputError
    from inversion.diagram import read_fit_trend

    folder = _fit_folder(tmp_path)
    fj = folder / "fit.json"
    if damage == "bytes":
        fj.write_bytes(b"\x85" + fj.read_bytes())
    elif damage == "json":
        fj.write_text(fj.read_text()[:-3], encoding="utf-8")
    elif damage == "param":
        fj.write_text(json.dumps({**RESULT_FIT, "volatility": {"form": "kinked",
                                                              "T0": "hot", "slope": 0.0}}))
    elif damage == "residual":
        (folder / "residuals.csv").write_text(RESULT_RESIDUALS.replace("-0.75", "inf"))
    else:
        fj.write_bytes(b"\xef\xbb\xbf" + fj.read_bytes())
        assert read_fit_trend(folder).params == {"T0": 1380.0, "slope": 0.002}
        return
    with pytest.raises(InputError) as err:
        read_fit_trend(folder)
    assert str(folder) in str(err.value) and "\n" not in str(err.value)


def test_command_line_classes_give_one_line_and_status_2(
        tmp_path: Path, capsys: pytest.CaptureFixture[str],
        monkeypatch: pytest.MonkeyPatch) -> None:
    """Classes of the command-line sweep: no command (help only, no error line); a
    path the system refuses (name too long; --out under /proc) as a traceback; a
    broken math title; a reference element no case accepts; --top 0; an empty
    --star-id; a planet mass of 1e40 kg; a damaged batch run record on --resume."""
    from inversion.cli import main

    monkeypatch.chdir(tmp_path)
    for name in ("star_abundances.csv", "catalog.csv", "case.toml", "target.csv"):
        (tmp_path / name).write_text(_template(name), encoding="utf-8")
    (tmp_path / "b").mkdir()
    (tmp_path / "b" / "run.json").write_text("{not json", encoding="utf-8")
    runs = [
        [],
        ["report", "z" * 300],
        ["diagram", "BSE_MS95", "--out", "/proc/d.svg"],
        ["diagram", "BSE_MS95", "--out", "d.svg", "--title", "$\\frac{$"],
        ["diagram", "BSE_MS95", "--out", "d.svg", "--reference", "O"],
        ["rank", "case.toml", "--out", "r", "--workers", "1", "--top", "0"],
        ["star", "star_abundances.csv", "--out", "s", "--star-id", ""],
        ["star", "star_abundances.csv", "--out", "s", "--planet-mass-kg", "1e40"],
        ["star", "star_abundances.csv", "--out", "s", "--pattern", "y" * 300],
        ["star", "star_abundances.csv", "--out", "s", "--dIW=-1000"],
        ["star", "star_abundances.csv", "--out", "s", "--seed", "-1"],
        ["batch", "catalog.csv", "--out", "b", "--resume", "--workers", "1"],
        ["batch", "catalog.csv", "--out", "b2", "--partition-size", "0"],
    ]
    for args in runs:
        assert main(args) == 2, args
        err = capsys.readouterr().err
        assert err.startswith("planetmix: error:") and err.count("\n") == 1, (args, err)
    assert not (tmp_path / "d.svg").exists() and not (tmp_path / "s").exists()
    assert not (tmp_path / "r").exists() and not (tmp_path / "b2").exists()


def _case_folder(tmp_path: Path, edit: Callable[[str], str] | None = None) -> Path:
    for name in ("target.csv", "component.csv"):
        (tmp_path / name).write_text(_template(name), encoding="utf-8")
    text = _template("case.toml")
    path = tmp_path / "case.toml"
    path.write_text(edit(text) if edit else text, encoding="utf-8")
    return path


@pytest.mark.parametrize("special", ["fifo", "dev-zero", "dev-urandom", "sparse", "folder"])
def test_special_files_are_refused_before_reading(tmp_path: Path, special: str) -> None:
    """Class: a FIFO as a component, case file or --pattern hung; /dev/zero or
    /dev/urandom grew memory without bound; a folder gave IsADirectoryError. Every
    door refuses them at once (an alarm fails the test instead of hanging it)."""
    import os
    import signal

    from components.exceptions import InputError
    from inversion import batch, case, star

    if special == "fifo":
        path = tmp_path / "in.csv"
        os.mkfifo(path)
    elif special == "sparse":
        path = tmp_path / "in.csv"
        with open(path, "wb") as fh:
            fh.truncate(300 * 2 ** 20)  # holes only: no disk used
    elif special == "folder":
        path = tmp_path / "in.csv"
        path.mkdir()
    else:
        path = Path("/dev/zero" if special == "dev-zero" else "/dev/urandom")
    doors = [lambda: case.read_target(path), lambda: case.load_case(path),
             lambda: star.read_star_table(path), lambda: batch.read_catalogue(path),
             lambda: star.read_pattern(path),
             lambda: case._resolve_component(str(path), tmp_path, "case.toml", "c")]

    def hung(*_: object) -> None:
        raise TimeoutError("a door read a special file")

    old = signal.signal(signal.SIGALRM, hung)
    try:
        for door in doors:
            signal.alarm(10)
            with pytest.raises(InputError) as err:
                door()
            signal.alarm(0)
            assert str(path) in str(err.value) and "\n" not in str(err.value)
    finally:
        signal.alarm(0)
        signal.signal(signal.SIGALRM, old)


@pytest.mark.parametrize("value", ['"banana"', "[0.7, 0.2]", "[0.2, 1.5]", "[true, 0.5]",
                                   "0.3"])
def test_cmf_range_is_checked(tmp_path: Path, value: str) -> None:
    """Class: [fit] cmf_range accepted with any value (even "banana")."""
    from components.exceptions import InputError
    from inversion.case import load_case

    path = _case_folder(tmp_path, lambda t: t.replace("# cmf_range = [0.20, 0.35]",
                                                      f"cmf_range = {value}"))
    with pytest.raises(InputError) as err:
        load_case(path)
    assert err.value.field == "fit.cmf_range"
    ok = _case_folder(tmp_path, lambda t: t.replace("# cmf_range = [0.20, 0.35]",
                                                    "cmf_range = [0.20, 0.35]"))
    assert load_case(ok).cmf_range == (0.20, 0.35)


def test_mass_fractions_far_above_100_wt_percent_are_refused(tmp_path: Path) -> None:
    """Class: a table whose concentrations sum far above 100 wt% (each value plausible
    on its own) was accepted."""
    from components.exceptions import InputError
    from inversion import case

    comments, header, rows = _split(_template("target.csv"))
    iv, iu = header.index("value"), header.index("unit")
    for r in rows:
        if r[iu] == "wt%":
            r[iv] = f"{float(r[iv]) * 1.6:g}"  # each below 100 wt%, the sum ~160
    path = tmp_path / "t.csv"
    path.write_text(_join(comments, header, rows), encoding="utf-8")
    with pytest.raises(InputError) as err:
        case.read_target(path, default_uncertainty_pct=10)
    assert "105" in str(err.value) and str(path) in str(err.value)


@pytest.mark.parametrize("edit,field", [
    (lambda t: t.replace("[core.D]\nNi = 26.0\n", "").replace(
        "mantle_FeO_wt = 8.05", "mantle_FeO_wt = 8.05\nD = true"), "core.D"),
    (lambda t: t.replace("[isotopes]", "[isotopes_old]").replace(
        "e54Cr = [0.0, 0.1]\ne50Ti = [0.0, 0.1]\n", "").replace(
        "[isotopes_old]", "").replace('title = "', 'isotopes = 2\ntitle = "'), "isotopes"),
    (lambda t: t.replace("[priors]", "[priors_old]").replace(
        'tau = {dist = "HalfNormal", sigma = 0.05}', "").replace("[priors_old]", "").replace(
        'title = "', 'priors = -2.5\ntitle = "'), "priors"),
    (lambda t: t.replace('tau = {dist = "HalfNormal", sigma = 0.05}',
                         "tau = {dist = [1, 2]}"), "priors.tau"),
    (lambda t: t.replace('table = "target.csv"', "table = 0.0"), "target.table"),
    (lambda t: t.replace("# cmf_range = [0.20, 0.35]", 'cmf_range = ["a", 0.7]'),
     "fit.cmf_range"),
])
def test_the_issue_examples_of_wrong_types(tmp_path: Path, edit: Callable[[str], str],
                                           field: str) -> None:
    """Class: case values of the wrong type (the issue's own examples) gave
    AttributeError/TypeError in case.py and bayes.py."""
    from components.exceptions import InputError
    from inversion.case import load_case

    with pytest.raises(InputError) as err:
        load_case(_case_folder(tmp_path, edit))
    assert str(err.value.field).startswith(field) and "\n" not in str(err.value)


def test_a_planet_with_non_finite_results_is_never_a_success() -> None:
    """Class: star abundances of +-400 dex or uncertainties of 1e300 gave all-NaN
    planets marked ``ok``. The door refuses such rows; behind it, rows built directly
    with those values (as a caller of the library could) still come out ``failed``,
    while a normal star in the same partition is ``ok`` with finite results."""
    from inversion.batch import CatalogueRow, run_partition
    from inversion.star import StarInput, StarSettings, earth_calibrated_pattern

    settings = StarSettings(pattern=earth_calibrated_pattern(), draws=50, seed=5)
    base = {"Fe": 0.0, "Mg": 0.0, "Si": 0.0}
    err = {"Fe": 0.05, "Mg": 0.05, "Si": 0.05}
    stars = [("normal", base, err), ("plus400", {**base, "Mg": 400.0}, err),
             ("minus400", {**base, "Fe": -400.0}, err),
             ("sigma1e300", base, {**err, "Si": 1e300})]
    rows = [CatalogueRow(i + 2, sid, StarInput(sid, v, e, ()))
            for i, (sid, v, e) in enumerate(stars)]
    out = run_partition(rows, settings).set_index("star_id")
    medians = [c for c in out.columns if c.endswith("_median")]
    assert out.loc["normal", "status"] == "ok"
    assert np.isfinite(out.loc["normal", medians].to_numpy(float)).all()
    for sid in ("plus400", "minus400", "sigma1e300"):
        ok = out.loc[sid, "status"] == "ok"
        assert not ok or np.isfinite(out.loc[sid, medians].to_numpy(float)).all(), sid


if __name__ == "__main__":  # pragma: no cover - the report's counts
    import tempfile

    n = int(sys.argv[1]) if len(sys.argv) > 1 else FAST_PER_KIND
    with tempfile.TemporaryDirectory() as d:
        res = run_fuzz(Path(d), n)
    total = Tally()
    for kind, t in res.items():
        print(f"{kind:10s} {t.line()}")
        for name in ("tracebacks", "accepted_invalid", "rejected_valid", "bad_messages"):
            for cause, cnt in getattr(t, name).most_common(8):
                print(f"    {name}: {cnt} x {cause}")
        total.inputs += t.inputs
        total.project_errors += t.project_errors
        total.accepted += t.accepted
        total.tracebacks.update(t.tracebacks)
        total.accepted_invalid.update(t.accepted_invalid)
        total.rejected_valid.update(t.rejected_valid)
        total.bad_messages.update(t.bad_messages)
    print(f"{'total':10s} {total.line()}")
