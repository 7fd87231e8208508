"""The stand-alone abundance diagram: values, files and label placement."""

from __future__ import annotations

import itertools
import math

import matplotlib.pyplot as plt
import numpy as np
import pytest

import components
from inversion import diagram
from inversion.cli import main


def _write(path, rows, name):
    lines = [f"# name: {name}", "element,value,unit"]
    lines += [f"{e},{v},{u}" for e, v, u in rows]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return str(path)


@pytest.fixture()
def tables(tmp_path):
    # invented compositions; the check values below are computed by hand from them
    a = _write(tmp_path / "a.csv", [("Al", 2.0, "wt%"), ("Ca", 2.5, "wt%"),
                                    ("Na", 3000, "ppm"), ("Zn", 50, "ppm"),
                                    ("Mg", 20.0, "wt%"), ("Fe", 6.0, "wt%")], "bodyA")
    b = _write(tmp_path / "b.csv", [("Al", 1.5, "wt%"), ("Ca", 1.2, "wt%"),
                                    ("Na", 800, "ppm"), ("Zn", 5, "ppm"),
                                    ("Mg", 18.0, "wt%"), ("Fe", 8.0, "wt%")], "bodyB")
    n = _write(tmp_path / "n.csv", [("Al", 1.0, "wt%"), ("Ca", 1.0, "wt%"),
                                    ("Na", 5000, "ppm"), ("Zn", 300, "ppm"),
                                    ("Mg", 10.0, "wt%"), ("Fe", 20.0, "wt%")], "normX")
    return a, b, n


def test_values_match_hand_computation_with_other_normaliser_and_reference(tables):
    a, b, n = tables
    pts = diagram.diagram_table([diagram.resolve_composition(a),
                                 diagram.resolve_composition(b)], reference="Al",
                                normaliser=diagram.resolve_composition(n))
    got = pts.set_index(["body", "element"])["y"]
    # y = log10[(X/Al)_body / (X/Al)_normaliser], by hand from the invented files
    hand = {("bodyA", "Ca"): math.log10((2.5 / 2.0) / (1.0 / 1.0)),
            ("bodyA", "Na"): math.log10((0.3 / 2.0) / (0.5 / 1.0)),
            ("bodyA", "Zn"): math.log10((0.005 / 2.0) / (0.03 / 1.0)),
            ("bodyB", "Ca"): math.log10((1.2 / 1.5) / 1.0),
            ("bodyB", "Na"): math.log10((0.08 / 1.5) / 0.5),
            ("bodyB", "Zn"): math.log10((0.0005 / 1.5) / 0.03)}
    for key, val in hand.items():
        assert got[key] == pytest.approx(val, abs=1e-12)
    assert "Al" not in set(pts["element"])  # the reference itself is not drawn
    # drawn on a logarithmic axis as the ratio itself: 10**y at each element's Tc
    fig = diagram.abundance_diagram(pts, reference="Al",
                                    normaliser=diagram.resolve_composition(n))
    ax = fig.axes[0]
    assert ax.get_yscale() == "log" and ax.get_xlim()[0] > ax.get_xlim()[1]
    # labels as mathtext with subscripts, the tables named in words, not by their keys
    assert r"(\mathrm{X}/\mathrm{Al})_{\mathrm{body}}" in ax.get_ylabel()
    assert r"_{\mathrm{normX}}" in ax.get_ylabel()
    assert "Lodders 2003" in ax.get_xlabel() and "lodders2003" not in ax.get_xlabel()
    drawn = np.vstack([np.column_stack(ln.get_data()) for ln in ax.lines
                       if ln.get_marker() not in ("None", "", None) and len(ln.get_xdata())])
    tc_el = pts.drop_duplicates("element").set_index("element")["tc50"]
    for (_body, el), val in hand.items():
        hit = np.isclose(drawn[:, 0], tc_el[el]) & np.isclose(drawn[:, 1], 10.0 ** val,
                                                              rtol=1e-12)
        assert hit.any(), (_body, el)
    plt.close(fig)
    # temperatures from the element table (Lodders 2003 Table 8: Ca 1517 K, Zn 726 K,
    # from memory of that table; here only checked to come from the library)
    tc = pts.drop_duplicates("element").set_index("element")["tc50"]
    props = components.elements()
    assert tc["Zn"] == props.loc["Zn", "tc50_lodders2003"]
    assert tc["Ca"] > tc["Na"] > tc["Zn"]


def test_engine_normalisation_is_the_same_quantity():
    # the CI case of log_normalised is what compile_problem fits: log10(C_i/C_R/q_ci)
    bse = components.load("BSE_MS95").composition
    ci = components.load("CI").composition
    y = diagram.log_normalised(bse, ci, "Mg")
    assert y["Mg"] == 0.0
    assert y["Al"] == pytest.approx(np.log10((bse["Al"] / bse["Mg"]) / (ci["Al"] / ci["Mg"])))


def test_cli_writes_svg_with_text_pdf_with_truetype_and_300dpi_png(tables, tmp_path, capsys):
    a, b, n = tables
    svg = tmp_path / "d.svg"
    assert main(["diagram", a, b, "--reference", "Al", "--normaliser", n, "--out",
                 str(svg)]) == 0
    text = svg.read_text(encoding="utf-8")
    assert text.count("<text") >= 8  # axis labels, ticks and element symbols stay text
    assert ">Zn<" in text or "Zn</text>" in text
    pdf = tmp_path / "d.pdf"
    assert main(["diagram", "BSE_MS95", "--out", str(pdf), "--width", "double"]) == 0
    assert b"/FontFile2" in pdf.read_bytes()  # TrueType embedded (fonttype 42)
    png = tmp_path / "d.png"
    assert main(["diagram", "BSE_MS95", "--out", str(png)]) == 0
    from PIL import Image

    with Image.open(png) as im:
        assert im.size[0] == round(3.5 * 300)
    assert main(["diagram", "BSE_MS95", "--out", str(tmp_path / "d.jpg")]) == 2
    assert main(["diagram", "BSE_MS95", "--out", str(png), "--width", "wide"]) == 2
    assert main(["diagram", "BSE_MS95", "--out", str(png), "--reference", "Xx"]) == 2
    assert "--out" in capsys.readouterr().err


@pytest.mark.parametrize("width", ["single", "double"])
def test_no_two_labels_overlap_and_every_element_is_labelled(width):
    pts = diagram.diagram_table([components.load("BSE_MS95"), components.load("BSE_PO14")])
    fig = diagram.abundance_diagram(pts, width=width)
    fig.canvas.draw()
    boxes = diagram.label_boxes(fig)
    assert set(boxes) == set(pts["element"])
    assert fig.get_size_inches()[0] == pytest.approx(diagram.FIGURE_WIDTHS[width])
    for (e1, b1), (e2, b2) in itertools.combinations(boxes.items(), 2):
        overlap = (b1[0] < b2[2] and b2[0] < b1[2] and b1[1] < b2[3] and b2[1] < b1[3])
        assert not overlap, (e1, e2)
    ax = fig.axes[0]
    assert ax.get_xlim()[0] > ax.get_xlim()[1]  # hot on the left
    # nothing drawn outside the page: legend and every text inside the figure
    page = fig.bbox
    renderer = fig.canvas.get_renderer()
    for artist in [*fig.legends, *ax.texts, *fig.texts]:
        bb = artist.get_window_extent(renderer)
        assert bb.x0 >= page.x0 - 1 and bb.x1 <= page.x1 + 1, artist
        assert bb.y0 >= page.y0 - 1 and bb.y1 <= page.y1 + 1, artist
    plt.close(fig)


def test_fit_overlay_reads_the_trend_and_refuses_another_reference(tmp_path):
    import json

    import pandas as pd

    folder = tmp_path / "fit"
    folder.mkdir()
    # a simulated fit: kinked trend T0 1300 K, slope 0.002 dex/K; model = trend exactly
    props = components.elements()
    els = ["Al", "Ca", "Na", "K", "Zn", "Li"]
    tc = props.loc[els, "tc50_lodders2003"].to_numpy(float)
    model = np.minimum(0.0, 0.002 * (tc - 1300.0))
    pd.DataFrame({"element": els, "tc50": tc, "model": model}).to_csv(
        folder / "residuals.csv", index=False)
    (folder / "fit.json").write_text(json.dumps({
        "status": "optimal", "title": "simulated",
        "volatility": {"form": "kinked", "T0": 1300.0, "slope": 0.002},
        "provenance": {"reference_element": "Mg", "condensation_table": "lodders2003"}}))
    trend = diagram.read_fit_trend(folder)
    assert trend.params == {"T0": 1300.0, "slope": 0.002}
    pts = diagram.diagram_table([components.load("BSE_MS95")])
    fig = diagram.abundance_diagram(pts, fit=trend)
    curve = [ln for ln in fig.axes[0].lines if ln.get_color() == diagram.OKABE_ITO["sky"]][0]
    x, y = curve.get_data()
    # the curve passes through the simulated lithophile model points (zero shift); the
    # axis is logarithmic: the curve is drawn as the ratio, 10**(-0.6) at 1000 K
    assert fig.axes[0].get_yscale() == "log"
    assert np.log10(np.interp(1000.0, x[::-1] if x[0] > x[-1] else x,
                              y[::-1] if x[0] > x[-1] else y)) == pytest.approx(-0.6, abs=1e-3)
    # the legend with the long trend entry stays inside the single-column page
    fig.canvas.draw()
    for leg in fig.legends:
        bb = leg.get_window_extent(fig.canvas.get_renderer())
        assert fig.bbox.x0 - 1 <= bb.x0 and bb.x1 <= fig.bbox.x1 + 1
    plt.close(fig)
    out = tmp_path / "f.svg"
    assert main(["diagram", "BSE_MS95", "--fit", str(folder), "--out", str(out)]) == 0
    assert main(["diagram", "BSE_MS95", "--fit", str(folder), "--reference", "Al",
                 "--out", str(out)]) == 2
