"""The normalised abundance against condensation temperature diagram, on its own.

Any compositions (library names or the user's own CSV files) are drawn together, no fit
needed: for each element ``X`` of a body, with reference element ``R`` and normaliser
``N`` (CI chondrites by default),

    y_X = log10[(C_X / C_R)_body / (C_X / C_R)_N]

against the 50% condensation temperature of ``X`` (docs/model.md, section 1). This is the
quantity the engine fits (:func:`inversion.model.compile_problem` computes the same ratio
with the case's normaliser, CI unless ``[target] normaliser`` names another).

Figure conventions: temperature falls to the right (a linear axis, the convention of such
diagrams: a logarithmic temperature axis would crowd the refractory elements, 1350-1800 K,
into a narrow strip); the normalised abundance on a logarithmic axis (decades labelled
``10^n``, the table's values in dex are ``log10`` of the plotted ratio); geochemical
classes by colour and marker (the Okabe & Ito 2008 colour-blind-safe colours, each class
also with its own marker shape); cosmochemical classes as shaded bands; each element
symbol placed where its rendered box overlaps no other label and no marker; widths of
one journal column (3.5 in) or two (7.2 in); vector PDF (TrueType fonts) and SVG
(editable ``<text>``), or PNG at 300 dpi.

References
----------
Lodders K. (2003) ApJ 591, 1220 (CI chondrites; 50% condensation temperatures).
Wood B. J., Smythe D. J., Harrison T. (2019) Am. Mineral. 104, 844 (condensation
temperatures).
Okabe M., Ito K. (2008) Color Universal Design (the colour palette).
"""

from __future__ import annotations

import argparse
import json
import re
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal

import matplotlib

matplotlib.use("Agg")

import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402
from matplotlib.ticker import MultipleLocator  # noqa: E402

import components  # noqa: E402

from .case import CONDENSATION_TABLES  # noqa: E402
from .cli import EXIT_OK, register  # noqa: E402
from .exceptions import InputError  # noqa: E402
from .model import MODEL_EXCLUDED  # noqa: E402
from .options import check_option  # noqa: E402
from .plots import (  # noqa: E402
    _COSMO_ORDER,
    CLASS_STYLE,
    OKABE_ITO,
    _class_style,
    _cosmo_bands,
    _log_ratio_axis,
    plot_style,
)
from .volatility import FORMS, log10_retained  # noqa: E402

__all__ = ["FIGURE_WIDTHS", "FitTrend", "resolve_composition", "log_normalised",
           "diagram_table", "read_fit_trend", "abundance_diagram", "save_diagram",
           "label_boxes", "short_citation"]

#: Figure widths [in]: one and two journal columns (common practice).
FIGURE_WIDTHS: dict[str, float] = {"single": 3.5, "double": 7.2}
#: Output formats by file suffix.
_FORMATS = {".svg": "svg", ".pdf": "pdf", ".png": "png"}
#: Fill styles that tell the bodies apart (the class sets colour and marker).
_BODY_FILL = ("full", "none", "left", "bottom", "right", "top")


def short_citation(key: str) -> str:
    """``Lodders 2003``, ``Wasson & Kallemeyn 1988`` or ``Wood et al. 2019`` for a key.

    Parameters
    ----------
    key : str
        A source key of the library (``components.sources()``).
    """
    srcs = components.sources()
    if key not in srcs.index:
        return key
    text = str(srcs.loc[key, "citation"])
    m = re.match(r"^(.*?)\((\d{4})\)", text)
    if not m:
        return key
    names = re.findall(r"([A-Z][\w'\-]+(?: [a-z]+)?)\s+(?:[A-Z]\.\s?-?\s?)+", m.group(1))
    if not names:
        return key
    who = (names[0] if len(names) == 1 else f"{names[0]} & {names[1]}" if len(names) == 2
           else f"{names[0]} et al.")
    return f"{who} {m.group(2)}"


def resolve_composition(name: str) -> components.Component:
    """A library composition by name, or the user's own composition CSV by path.

    Parameters
    ----------
    name : str
        A name of :func:`components.available` (``CI``, ``BSE_MS95``...) or the path of a
        CSV in the component format (``planetmix template component``).
    """
    if name in components.available():
        return components.load(name)
    path = Path(name)
    if path.suffix.lower() == ".csv" or path.exists():
        if not path.is_file():
            raise InputError("composition file not found", file=str(path))
        from .case import _check_user_component

        c = components.read_component(path)
        _check_user_component(c, str(path), "TABLE")  # not named like a library table
        return c
    raise InputError(f"not a library table and not a CSV file; the library holds "
                     f"{components.available()}", field="TABLE", value=name)


def log_normalised(composition: pd.Series, normaliser: pd.Series, reference: str
                   ) -> pd.Series:
    """log10 of the reference- and normaliser-normalised abundance of each element.

    Parameters
    ----------
    composition : Series
        Mass fractions [kg/kg] of the body, indexed by element.
    normaliser : Series
        Mass fractions [kg/kg] of the normalising composition (CI chondrites usually).
    reference : str
        The reference element R.

    Returns
    -------
    Series
        ``log10[(C_X/C_R)_body / (C_X/C_R)_normaliser]`` [dex] for the elements both hold
        with a positive value; 0 for R itself.

    Examples
    --------
    >>> import pandas as pd
    >>> body = pd.Series({"Mg": 0.2, "Al": 0.02})
    >>> ci = pd.Series({"Mg": 0.1, "Al": 0.02})
    >>> round(float(log_normalised(body, ci, "Mg")["Al"]), 6)
    -0.30103
    """
    for what, s in (("composition", composition), ("normaliser", normaliser)):
        if reference not in s.index or not s[reference] > 0:
            raise InputError(f"the {what} has no {reference}, the reference element; choose "
                             "another with --reference", field="reference", value=reference)
    both = [e for e in composition.index
            if e in normaliser.index and composition[e] > 0 and normaliser[e] > 0]
    c = composition[both].astype(float)
    n = normaliser[both].astype(float)
    return np.log10((c / c[reference]) / (n / n[reference]))


def diagram_table(tables: Sequence[components.Component], *, reference: str = "Mg",
                  normaliser: components.Component | None = None,
                  condensation_table: str = "lodders2003") -> pd.DataFrame:
    """The points of the diagram: one row per body and element.

    Parameters
    ----------
    tables : sequence of Component
        The bodies to draw.
    reference : str
        Reference element R.
    normaliser : Component, optional
        Normalising composition (default: the library's CI chondrites).
    condensation_table : str
        ``lodders2003`` or ``wood2019`` (the same choice as a case file's
        ``[volatility] condensation_table``).

    Returns
    -------
    DataFrame
        Columns ``body``, ``source`` (legend label: name and citation), ``element``,
        ``tc50`` [K], ``y`` [dex], ``sigma`` [dex, NaN where
        the table gives no uncertainty], ``geochemical_class``, ``cosmochemical_class``.
        Elements without a condensation temperature in the chosen table are left out.
    """
    check_option("condensation table", condensation_table, CONDENSATION_TABLES,
                 field="--condensation-table")
    norm = normaliser if normaliser is not None else components.load("CI")
    props = components.elements()
    col = CONDENSATION_TABLES[condensation_table]
    rows = []
    for comp in tables:
        y = log_normalised(comp.composition, norm.composition, reference)
        rel = (comp.uncertainty.reindex(y.index) / comp.composition.reindex(y.index))
        for el, val in y.items():
            if el == reference or el not in props.index or el in MODEL_EXCLUDED:
                continue
            tc = float(props.loc[el, col])
            if not np.isfinite(tc):
                continue
            r = float(rel.get(el, np.nan))
            rows.append({"body": comp.name, "source": _norm_label(comp), "element": el,
                         "tc50": tc, "y": float(val),
                         "sigma": float(np.log10(1.0 + r)) if np.isfinite(r) else np.nan,
                         "geochemical_class": props.loc[el, "geochemical_class"],
                         "cosmochemical_class": props.loc[el, "cosmochemical_class"]})
    if not rows:
        raise InputError("no element to draw: the tables and the normaliser share no element "
                         "with a condensation temperature", field="TABLE")
    return pd.DataFrame(rows)


@dataclass(frozen=True)
class FitTrend:
    """The fitted volatility trend of a result folder, ready to draw.

    Attributes
    ----------
    form : str
    params : dict of str to float
    reference : str
    condensation_table : str
    label : str
        The body the fit describes (the result's title).
    model : DataFrame
        ``element``, ``tc50`` [K], ``model`` [dex] (the fit's value for each element).
    normaliser : str
        The normalising composition of the fit's abundances (fit.json ``normaliser``).
    """

    form: str
    params: dict[str, float]
    reference: str
    condensation_table: str
    label: str
    model: pd.DataFrame
    normaliser: str = "CI"


def read_fit_trend(folder: str | Path) -> FitTrend:
    """Read the volatility trend from a ``planetmix fit`` result folder.

    Parameters
    ----------
    folder : str or Path
        The folder holding ``fit.json`` and ``residuals.csv``.
    """
    folder = Path(folder)
    path = folder / "fit.json"
    if not path.is_file():
        raise InputError("not a fit result folder (no fit.json)", file=str(folder),
                         field="--fit")
    from components._tables import read_csv_checked, read_text_checked

    # a result file read back goes through the input door: it may be damaged or edited
    try:
        d = json.loads(read_text_checked(path, what="fit result"))
    except (json.JSONDecodeError, RecursionError) as err:
        raise InputError(f"not valid JSON ({' '.join(str(err).split()) or 'nested too deeply'}"
                         "); the result folder is damaged: rerun planetmix fit",
                         file=str(path), field="--fit") from None
    if not isinstance(d, dict):
        raise InputError("not a fit result (no JSON object)", file=str(path), field="--fit")
    if not str(d.get("status", "")).startswith("optimal"):
        raise InputError("the fit in this folder is infeasible and has no trend",
                         file=str(path), field="status", value=d.get("status"))
    vol = d.get("volatility")
    vol = dict(vol) if isinstance(vol, dict) else {}
    form = str(vol.pop("form", ""))
    if form not in FORMS:
        raise InputError("unknown volatility form in the fit", file=str(path),
                         field="volatility.form", value=form)
    params = {}
    for k in FORMS[form].params:
        v = vol.get(k)
        if isinstance(v, bool) or not isinstance(v, int | float) or not np.isfinite(v):
            raise InputError(f"parameter {k} of the {form} form is missing or not a finite "
                             "number", file=str(path), field=f"volatility.{k}", value=v)
        params[k] = float(v)
    prov = d.get("provenance") if isinstance(d.get("provenance"), dict) else {}
    rfile = folder / "residuals.csv"
    resid = read_csv_checked(rfile, ["element", "tc50", "model"], what="fit residuals")
    for col in ("tc50", "model"):
        raw = resid[col].astype(str).str.strip()
        num = pd.to_numeric(raw.where(raw != ""), errors="coerce")
        bad = (raw != "") & ~np.isfinite(num.to_numpy(float))
        if bad.any():
            i = int(np.flatnonzero(bad.to_numpy())[0])
            raise InputError("not a finite number; the result folder is damaged: rerun "
                             "planetmix fit", file=str(rfile), row=i + 2, field=col,
                             value=raw.iloc[i])
        resid[col] = num.astype(float)
    return FitTrend(form=form, params=params,
                    reference=str(prov.get("reference_element", "Mg")),
                    condensation_table=str(prov.get("condensation_table", "lodders2003")),
                    label=str(d.get("title") or folder.name),
                    model=resid[["element", "tc50", "model"]].copy(),
                    normaliser=str(d.get("normaliser") or prov.get("normaliser") or "CI"))


def _tc_label(table: str) -> str:
    return (r"50% condensation temperature $T_{\mathrm{c}}$ [K] "
            f"({short_citation(table)}, $10^{{-4}}$ bar)")


def _mathtext(s: str) -> str:
    """A name as upright mathtext (underscores and spaces escaped)."""
    return r"\mathrm{" + s.replace("_", r"\_").replace(" ", r"\ ") + "}"


def _norm_label(norm: components.Component) -> str:
    keys = [k for k in norm.source_keys if k in components.sources().index]
    return f"{norm.name} ({short_citation(keys[0])})" if keys else norm.name


def abundance_diagram(points: pd.DataFrame, *, reference: str = "Mg",
                      normaliser: components.Component | None = None,
                      condensation_table: str = "lodders2003",
                      fit: FitTrend | None = None,
                      width: Literal["single", "double"] = "single",
                      title: str | None = None) -> Figure:
    """Draw the diagram of :func:`diagram_table` points.

    Parameters
    ----------
    points : DataFrame
        The output of :func:`diagram_table`.
    reference : str
        Reference element R (axis label).
    normaliser : Component, optional
        The normaliser used (axis label; default CI).
    condensation_table : str
        Condensation-temperature table used (axis label and class bands).
    fit : FitTrend, optional
        A fitted trend to overlay (the fit's model values and its volatility curve,
        shifted to the lithophile model level).
    width : {"single", "double"}
        One journal column (3.5 in) or two (7.2 in).
    title : str, optional

    Returns
    -------
    Figure
        Element labels carry the gid ``label-<element>`` (see :func:`label_boxes`).
    """
    check_option("figure width", width, FIGURE_WIDTHS, field="--width")
    norm = normaliser if normaliser is not None else components.load("CI")
    w_in = FIGURE_WIDTHS[width]
    small = width == "single"
    fs = 6.0 if small else 7.5
    label_fs = 5.0 if small else 6.5
    ms = 3.6 if small else 4.8
    bodies = list(dict.fromkeys(points["body"]))
    labels = {b: b for b in bodies}
    if "source" in points.columns:
        labels = dict(zip(points["body"], points["source"], strict=False))
    tc = points["tc50"].to_numpy(float)
    y = points["y"].to_numpy(float)
    x_hi = 2000.0
    x_lo = max(0.0, 50.0 * np.floor((float(np.nanmin(tc)) - 40.0) / 50.0))
    spans = [y]
    if fit is not None:
        spans.append(fit.model["model"].to_numpy(float))
    allv = np.concatenate([s[np.isfinite(s)] for s in spans])
    pad = 0.12 * max(np.ptp(allv), 0.5)
    y_lo, y_hi = float(allv.min() - pad), float(allv.max() + 2.2 * pad)
    rc = {"font.size": fs, "axes.labelsize": fs, "xtick.labelsize": fs - 0.5,
          "ytick.labelsize": fs - 0.5, "legend.fontsize": fs - 0.5, "axes.grid": False,
          "axes.linewidth": 0.6, "xtick.major.width": 0.6, "ytick.major.width": 0.6,
          "lines.linewidth": 0.8}
    with plot_style(), matplotlib.rc_context(rc):
        height = w_in * (0.95 if small else 0.55) + 0.25 * (len(bodies) > 1)
        fig, ax = plt.subplots(figsize=(w_in, height), layout="constrained")
        ax.set_xlim(x_hi, x_lo)
        _log_ratio_axis(ax, y_lo, y_hi)
        band_texts = []
        for cls, lo, hi in _cosmo_bands(CONDENSATION_TABLES[condensation_table]):
            lo, hi = max(lo, x_lo), min(hi, x_hi)
            if hi <= lo:
                continue
            shade = "#ededed" if _COSMO_ORDER.index(cls) % 2 == 0 else "#ffffff"
            ax.axvspan(lo, hi, color=shade, zorder=0, lw=0)
            name = cls.replace("_", " ")
            if small:
                name = {"refractory": "refr.", "main component": "main",
                        "moderately volatile": "mod. volatile",
                        "highly volatile": "highly vol."}.get(name, name)
            if (hi - lo) / (x_hi - x_lo) > 0.05:
                band_texts.append(ax.text(0.5 * (lo + hi), 0.985, name,
                                          transform=ax.get_xaxis_transform(), ha="center",
                                          va="top", fontsize=label_fs, color="#555555",
                                          zorder=1))
        ax.axhline(1.0, color="#888888", lw=0.6, ls=":", zorder=1)
        ax.xaxis.set_major_locator(MultipleLocator(200 if small else 100))
        if fit is not None:
            _draw_fit(ax, fit, x_lo, x_hi, ms)
        geo = points["geochemical_class"].astype(str).to_numpy()
        for b, body in enumerate(bodies):
            in_body = (points["body"] == body).to_numpy()
            for cls in list(CLASS_STYLE) + ["other"]:
                m = in_body & ((geo == cls) if cls != "other"
                               else ~np.isin(geo, list(CLASS_STYLE)))
                if not m.any():
                    continue
                colour, marker, _ = _class_style(cls)
                sig = np.nan_to_num(points["sigma"].to_numpy(float)[m])
                # a symmetric bar in dex is asymmetric in the ratio
                yerr = [10.0 ** y[m] * (1.0 - 10.0 ** -sig), 10.0 ** y[m] * (10.0 ** sig - 1.0)]
                ax.errorbar(tc[m], 10.0 ** y[m], yerr=yerr,
                            fmt=marker, ms=ms, color=colour, mec=colour, mew=0.7,
                            fillstyle=_BODY_FILL[b % len(_BODY_FILL)], mfc=colour,
                            mfcalt="white", ecolor=colour, elinewidth=0.6, capsize=0,
                            zorder=4)
        handles = []
        present = set(geo)
        for cls in CLASS_STYLE:
            if cls in present:
                colour, marker, label = _class_style(cls)
                handles.append(matplotlib.lines.Line2D([], [], ls="none", marker=marker,
                                                       ms=ms, color=colour, label=label))
        if len(bodies) > 1 or fit is None:
            for b, body in enumerate(bodies):
                handles.append(matplotlib.lines.Line2D(
                    [], [], ls="none", marker="o", ms=ms, mec="#555555", mfc="#555555",
                    mfcalt="white",
                    fillstyle=_BODY_FILL[b % len(_BODY_FILL)], label=labels[body]))
        if fit is not None:
            handles.append(matplotlib.lines.Line2D([], [], color=OKABE_ITO["sky"], lw=1.4,
                                                   label=_trend_label(fit)))
            handles.append(matplotlib.lines.Line2D([], [], ls="none", marker="_", ms=ms * 1.6,
                                                   mew=1.0, color="black",
                                                   label=f"model of the fit ({fit.label})"))
        ax.set_xlabel(_tc_label(condensation_table))
        r = _mathtext(reference)
        n = _mathtext(norm.name)
        ax.set_ylabel(rf"$(\mathrm{{X}}/{r})_{{\mathrm{{body}}}}\,/\,"
                      rf"(\mathrm{{X}}/{r})_{{{n}}}$")
        ncols = 2 if small or fit is not None else 4
        leg = fig.legend(handles=handles, loc="outside lower center", ncols=ncols,
                         handlelength=1.6, columnspacing=1.0, handletextpad=0.4)
        fig.canvas.draw()
        if leg.get_window_extent().width > fig.bbox.width:
            # too wide for the page (long trend label in one column): one entry per row
            leg.remove()
            fig.legend(handles=handles, loc="outside lower center", ncols=1,
                       handlelength=1.6, handletextpad=0.4)
        ax.text(1.0, 1.005, f"normaliser: {_norm_label(norm)}", transform=ax.transAxes,
                ha="right", va="bottom", fontsize=label_fs, color="#444444")
        if title:
            ax.set_title(title, loc="left", fontsize=fs + 0.5)
        fig.canvas.draw()
        fig.set_layout_engine("none")  # freeze the layout before measuring text
        shown = points.assign(y=10.0 ** y)  # in the axis' data units (the ratio)
        obstacles = shown[["tc50", "y"]].to_numpy(float)
        if fit is not None:
            mod = fit.model[["tc50", "model"]].dropna().to_numpy(float)
            obstacles = np.vstack([obstacles, np.column_stack([mod[:, 0], 10.0 ** mod[:, 1]])])
        _place_labels(fig, ax, shown, label_fs, ms, band_texts, obstacles)
    return fig


def _trend_label(fit: FitTrend) -> str:
    units = dict(zip(FORMS[fit.form].params, FORMS[fit.form].units, strict=True))
    txt = ", ".join(f"{_param_text(k)} = {v:.4g}{'' if units[k] == '1' else ' ' + units[k]}"
                    for k, v in fit.params.items())
    return f"volatility trend ({fit.form}: {txt})"


def _param_text(name: str) -> str:
    """``T0`` as ``$T_0$`` (a subscripted symbol); other names as they are."""
    import re

    m = re.fullmatch(r"([A-Za-z])(\d+)", name)
    return rf"${m.group(1)}_{{{m.group(2)}}}$" if m else name


def _draw_fit(ax: Any, fit: FitTrend, x_lo: float, x_hi: float, ms: float) -> None:
    props = components.elements()
    mod = fit.model.dropna(subset=["model"])
    mod = mod[np.isfinite(mod["model"].astype(float))]
    geo = props["geochemical_class"].reindex(mod["element"]).to_numpy()
    mt = mod["tc50"].to_numpy(float)
    mv = mod["model"].to_numpy(float)
    ax.scatter(mt, 10.0 ** mv, marker="_", s=(ms * 1.6) ** 2, color="black", lw=1.0, zorder=3)
    lith = geo == "lithophile"
    if not lith.any():
        lith = np.ones(len(mod), bool)
    params = np.array([[fit.params[k] for k in FORMS[fit.form].params]])
    shift = float(np.median(mv[lith] - log10_retained(fit.form, params, mt[lith])[0]))
    grid = np.geomspace(x_lo, x_hi, 300)
    # the curve is clipped by the axes: it never stretches the y range
    ax.plot(grid, 10.0 ** (log10_retained(fit.form, params, grid)[0] + shift),
            color=OKABE_ITO["sky"], lw=1.4, zorder=2.5)


def _overlaps(a: np.ndarray, boxes: np.ndarray) -> bool:
    if not len(boxes):
        return False
    return bool(np.any((a[0] < boxes[:, 2]) & (a[2] > boxes[:, 0])
                       & (a[1] < boxes[:, 3]) & (a[3] > boxes[:, 1])))


def _place_labels(fig: Figure, ax: Any, points: pd.DataFrame, fontsize: float, ms: float,
                  fixed_texts: list[Any], obstacles: np.ndarray,
                  texts: dict[str, str] | None = None,
                  styles: dict[str, dict[str, Any]] | None = None) -> None:
    """Place one symbol per element near its highest point, measuring rendered boxes.

    Candidate offsets at growing distance in sixteen directions; the first whose box lies in
    the axes and overlaps no placed label, no band label and no marker is taken; labels
    placed farther than the nearest ring get a thin leader line.
    """
    renderer = fig.canvas.get_renderer()
    px = fig.dpi / 72.0
    axbox = ax.get_window_extent(renderer)
    disp = ax.transData.transform(points[["tc50", "y"]].to_numpy(float))
    obs = ax.transData.transform(obstacles)
    half = 0.5 * ms * px + 0.5
    markers = np.column_stack([obs[:, 0] - half, obs[:, 1] - half,
                               obs[:, 0] + half, obs[:, 1] + half])
    taken = [np.array(t.get_window_extent(renderer).extents) for t in fixed_texts]
    order = (points.assign(_i=np.arange(len(points)))
             .sort_values(["element", "y"], ascending=[True, False])
             .drop_duplicates("element").sort_values("tc50", ascending=False))
    directions = [(0, 1), (0, -1), (1, 0), (-1, 0), (1, 1), (-1, 1), (1, -1), (-1, -1),
                  (2, 1), (-2, 1), (2, -1), (-2, -1), (1, 2), (-1, 2), (1, -2), (-1, -2)]
    rings = (1.0, 2.0, 3.5, 5.5, 8.0, 11.0, 15.0, 20.0, 26.0, 33.0)
    probe = ax.text(0, 0, "", fontsize=fontsize)
    for _, row in order.iterrows():
        el = row["element"]
        label = (texts or {}).get(el, el)
        probe.set_text(label)
        probe.set(**(styles or {}).get(el, {}))
        bb = probe.get_window_extent(renderer)
        w, h = bb.width + 1.0, bb.height + 1.0
        x0, y0 = disp[int(row["_i"])]
        best = None
        for ring in rings:
            gap = (0.5 * ms + ring) * px
            for dx, dy in directions:
                cx = x0 + dx * (gap + 0.5 * w if dx else 0.0)
                cy = y0 + dy * (gap + 0.5 * h if dy else 0.0)
                box = np.array([cx - 0.5 * w, cy - 0.5 * h, cx + 0.5 * w, cy + 0.5 * h])
                if (box[0] < axbox.x0 or box[2] > axbox.x1 or box[1] < axbox.y0
                        or box[3] > axbox.y1):
                    continue
                if _overlaps(box, markers) or _overlaps(box, np.array(taken)):
                    continue
                best = (box, cx, cy, ring)
                break
            if best is not None:
                break
        if best is None:
            continue  # no free place: counted in the figure's note below
        box, cx, cy, ring = best
        taken.append(box)
        xy = ax.transData.inverted().transform((cx, cy))
        t = ax.text(xy[0], xy[1], label, fontsize=fontsize, ha="center", va="center",
                    color="#222222", zorder=6, **(styles or {}).get(el, {}))
        probe.set(fontweight="normal")
        t.set_gid(f"label-{el}")
        if ring > rings[1]:
            ax.annotate("", xy=(row["tc50"], row["y"]), xytext=(xy[0], xy[1]),
                        arrowprops={"arrowstyle": "-", "lw": 0.3, "color": "#777777",
                                    "shrinkA": 0.5 * fontsize, "shrinkB": 0.5 * ms},
                        zorder=5)
    probe.remove()
    placed = {t.get_gid() for t in ax.texts if (t.get_gid() or "").startswith("label-")}
    missing = [e for e in order["element"] if f"label-{e}" not in placed]
    if missing:
        fig.text(0.005, 0.005, "unlabelled (no free place): " + " ".join(missing),
                 fontsize=fontsize * 0.9, color="#666666", ha="left", va="bottom")


def label_boxes(fig: Figure) -> dict[str, tuple[float, float, float, float]]:
    """Rendered boxes (display pixels x0, y0, x1, y1) of the element labels of a diagram."""
    renderer = fig.canvas.get_renderer()
    out = {}
    for ax in fig.axes:
        for t in ax.texts:
            gid = t.get_gid() or ""
            if gid.startswith("label-"):
                out[gid[6:]] = tuple(t.get_window_extent(renderer).extents)
    return out


def save_diagram(fig: Figure, path: str | Path) -> Path:
    """Write the figure by its suffix: SVG (text kept as ``<text>``), PDF (TrueType fonts
    embedded, fonttype 42) or PNG (300 dpi)."""
    path = Path(path)
    fmt = _FORMATS.get(path.suffix.lower())
    if fmt is None:
        raise InputError(f"unknown figure format; use one of {sorted(_FORMATS)}",
                         file=str(path), field="--out", value=path.suffix)
    path.parent.mkdir(parents=True, exist_ok=True)
    meta = {"svg": {"Date": None}, "pdf": {"CreationDate": None, "ModDate": None},
            "png": {"Software": "planetmix (matplotlib)"}}[fmt]
    with matplotlib.rc_context({"svg.fonttype": "none", "pdf.fonttype": 42}):
        fig.savefig(path, format=fmt, dpi=300, metadata=meta)
    return path


@register("diagram", "draw the normalised abundance vs condensation temperature diagram of "
          "any compositions (no fit needed)")
def _diagram(parser: argparse.ArgumentParser):
    parser.add_argument("tables", nargs="+", metavar="TABLE",
                        help="library names (BSE_MS95, EH...) or composition CSV files")
    parser.add_argument("--out", required=True, help="figure file: .svg, .pdf or .png")
    parser.add_argument("--reference", default="Mg", metavar="ELEMENT",
                        help="reference element R (default Mg)")
    parser.add_argument("--normaliser", default="CI", metavar="NAME",
                        help="normalising composition: library name or CSV (default CI)")
    parser.add_argument("--condensation-table", default="lodders2003", metavar="NAME",
                        help="one of: " + ", ".join(CONDENSATION_TABLES))
    parser.add_argument("--fit", default=None, metavar="RESULT_DIR",
                        help="overlay the fitted trend of a 'planetmix fit' result folder")
    parser.add_argument("--width", default="single", metavar="single|double",
                        help="one journal column (3.5 in, default) or two (7.2 in)")
    parser.add_argument("--title", default=None, help="title above the axes")

    def run(args: argparse.Namespace) -> int:
        check_option("figure width", args.width, FIGURE_WIDTHS, field="--width")
        from .case import reference_elements

        check_option("reference element", args.reference, reference_elements(),
                     field="--reference")
        from matplotlib.cbook import is_math_text

        if args.title is not None and is_math_text(args.title):
            from matplotlib.mathtext import MathTextParser

            try:
                MathTextParser("path").parse(args.title)
            except ValueError:
                raise InputError("the $...$ part is not valid math text; escape a dollar "
                                 "sign as \\$", field="--title", value=args.title) from None
        if Path(args.out).suffix.lower() not in _FORMATS:
            raise InputError(f"unknown figure format; use one of {sorted(_FORMATS)}",
                             file=args.out, field="--out", value=Path(args.out).suffix)
        tables = [resolve_composition(t) for t in args.tables]
        norm = resolve_composition(args.normaliser)
        fit = read_fit_trend(args.fit) if args.fit else None
        if fit is not None:
            if norm.name != fit.normaliser or fit.reference != args.reference:
                raise InputError(f"the fit is normalised to {fit.normaliser} and "
                                 f"{fit.reference}; draw it with --normaliser "
                                 f"{fit.normaliser} --reference {fit.reference}",
                                 file=args.fit, field="--fit")
        pts = diagram_table(tables, reference=args.reference, normaliser=norm,
                            condensation_table=args.condensation_table)
        fig = abundance_diagram(pts, reference=args.reference, normaliser=norm,
                                condensation_table=args.condensation_table, fit=fit,
                                width=args.width, title=args.title)
        path = save_diagram(fig, args.out)
        plt.close(fig)
        n_el = pts["element"].nunique()
        print(f"diagram of {', '.join(t.name for t in tables)} ({n_el} elements; "
              f"{args.reference}- and {norm.name}-normalised; 50% condensation temperatures "
              f"of {short_citation(args.condensation_table)}) written to {path}")
        return EXIT_OK

    return run
