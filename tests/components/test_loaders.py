"""The one door for tables: every malformed table raises InputError naming file, row, field."""

from __future__ import annotations

import string

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import components
from components import InputError
from components.units import oxide_to_element_factor, parse_species


def _write(tmp_path, text: str):
    p = tmp_path / "block.csv"
    p.write_text(text, encoding="utf-8")
    return p


def test_user_component_round_trip(tmp_path) -> None:
    p = _write(tmp_path, "# name: MyBlock\nelement,value,unit,uncertainty\nMg,9.5,wt%,0.2\n"
               "SiO2,22.9,wt%,\nIr,460,ppb,20\n")
    c = components.read_component(p)
    assert c.name == "MyBlock"
    assert c.composition["Mg"] == pytest.approx(0.095)
    # SiO2 -> Si with formula weights from periodictable: Si/SiO2 = 28.0855/60.0843
    assert c.composition["Si"] == pytest.approx(0.229 * 28.0855 / 60.0843, rel=1e-4)
    assert c.composition["Ir"] == pytest.approx(460e-9)
    assert c.uncertainty["Mg"] == pytest.approx(0.002)


@pytest.mark.parametrize("text,row,field,fragment", [
    ("element,value,unit\nMg,9.5,wt%\nXx,1,ppm\n", 3, "element", "unknown element"),
    ("element,value,unit\nMg,9.5,wt%\nMg,9.6,wt%\n", 3, "element", "appears twice"),
    ("element,value,unit\nMg,-9.5,wt%\n", 2, "value", "negative"),
    ("element,value,unit\nMg,lots,wt%\n", 2, "value", "not a number"),
    ("element,value,unit\nMg,9.5,stone\n", 2, "unit", "unknown unit"),
    ("element,value,unit\nMgO,9.5,ppm\n", 2, "unit", "oxide concentrations must be"),
    ("element,value,unit,uncertainty\nMg,9.5,wt%,x\n", 2, "uncertainty", "not a number"),
])
def test_bad_rows_name_file_row_field(tmp_path, text, row, field, fragment) -> None:
    p = _write(tmp_path, text)
    with pytest.raises(InputError, match=fragment) as info:
        components.read_component(p)
    err = info.value
    assert err.file == str(p) and err.row == row and err.field == field
    assert str(p) in str(err) and f"row {row}" in str(err)


def test_empty_and_headerless_files(tmp_path) -> None:
    with pytest.raises(InputError, match="empty"):
        components.read_component(_write(tmp_path, ""))
    with pytest.raises(InputError, match="no data rows"):
        components.read_component(_write(tmp_path, "element,value,unit\n"))
    with pytest.raises(InputError, match="lacks column"):
        components.read_component(_write(tmp_path, "element,value\nMg,1\n"))


def test_unknown_library_name_lists_valid_ones() -> None:
    with pytest.raises(InputError, match="CI"):
        components.load("CQ")


def test_library_holds_ci_and_the_ten_groups_with_sources() -> None:
    names = set(components.available())
    assert {"CI", "CM", "CO", "CV", "CR", "CK", "H", "L", "LL", "EH", "EL"} <= names
    srcs = components.sources()
    for name in names:
        c = components.load(name)
        assert c.source_keys and all(k in srcs.index for k in c.source_keys)


def test_oxide_factors_against_periodictable_formula_weights() -> None:
    import periodictable

    for oxide in ("SiO2", "Al2O3", "FeO", "Na2O", "P2O5", "Cr2O3"):
        el, n, o = parse_species(oxide)
        f = periodictable.formula(oxide)
        expected = n * periodictable.elements.symbol(el).mass / f.mass
        assert oxide_to_element_factor(el, n, o) == pytest.approx(expected, rel=1e-12)


_cells = st.one_of(st.text(alphabet=string.printable, max_size=8),
                   st.sampled_from(["Mg", "Fe", "SiO2", "wt%", "ppm", "ppb", "-1", "nan",
                                    "1e400", "", "Zz", "1.5"]))


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow,
                                                                   HealthCheck.function_scoped_fixture])
@given(rows=st.lists(st.tuples(_cells, _cells, _cells), min_size=0, max_size=6),
       header=st.sampled_from(["element,value,unit", "element,value,unit,uncertainty_pct",
                               "element,value", "a,b,c"]))
def test_generated_tables_fail_only_with_input_error(tmp_path, rows, header) -> None:
    """Property: any generated table either loads or raises the project's own error."""
    ncol = header.count(",") + 1
    lines = [header] + [",".join((list(r) + ["5"])[:ncol]).replace("\n", " ") for r in rows]
    p = tmp_path / "gen.csv"
    p.write_text("\n".join(lines) + "\n", encoding="utf-8")
    try:
        c = components.read_component(p)
    except InputError:
        return
    assert (c.composition >= 0).all()


def test_user_component_carries_its_isotopes(tmp_path) -> None:
    p = _write(tmp_path, "# name: Mine\n# e54Cr: 0.12 0.05\nelement,value,unit\nMg,9.5,wt%\n")
    assert components.read_component(p).isotopes == {"e54Cr": (0.12, 0.05)}
    bad = _write(tmp_path, "# e54Cr: high\nelement,value,unit\nMg,9.5,wt%\n")
    with pytest.raises(InputError, match="e54Cr"):
        components.read_component(bad)
