"""Figures of a result: the standard diagnostics of a composition inversion, our own style.

Every function takes plain tables (the files a result folder holds, read with pandas) and
returns a :class:`matplotlib.figure.Figure`; :func:`save_figure` writes PNG and SVG,
:func:`png_bytes` and :func:`svg_text` give the bytes for embedding in a report. The
backend is Agg (no display needed).

Style (every figure): one journal column (3.5 in, :data:`SINGLE_COLUMN`) or two (7.2 in,
:data:`DOUBLE_COLUMN`) wide; PNG at 300 dpi and SVG with editable ``<text>``
(:func:`save_figure`); the Okabe & Ito (2008) colour-blind-safe palette, every class also
with its own marker shape so that the figures read in grey scale as well; symbols and
formulae as mathtext with subscripts (``T_0``, ``Al_2O_3``).

Figures
-------
- :func:`volatility_diagram`: the normaliser- (CI unless named) and
  reference-normalised abundance (logarithmic axis) against
  the 50% condensation temperature (hot on the left), coloured by geochemical class, with
  cosmochemical classes as labelled bands, uncertainty bars, the fitted pattern (and its
  credible band when draws exist) and the flagged outliers labelled.
- :func:`residuals_plot`: z-scores by element, ordered by condensation temperature.
- :func:`predictive_plot`: observed values against their posterior-predictive intervals.
- :func:`weights_plot`: building-block weights, point estimates or posterior draws.
- :func:`pair_plot`: pairwise posterior of the main parameters.
- :func:`ranking_plot`: the hypothesis ranking (delta BIC / AIC / LOO).
- :func:`planet_plot`: mantle major and minor oxides and the core (with intervals).
- :func:`heat_plot`: radiogenic heat production through time.
- :func:`distribution_plot`: distributions of planet properties across a catalogue.
"""

from __future__ import annotations

import contextlib
import io
from collections.abc import Iterator, Mapping, Sequence
from pathlib import Path

import matplotlib

matplotlib.use("Agg")

import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402

import components  # noqa: E402

from .volatility import log10_retained  # noqa: E402

__all__ = ["OKABE_ITO", "CLASS_STYLE", "plot_style", "volatility_diagram", "residuals_plot",
           "weights_plot", "pair_plot", "ranking_plot", "planet_plot", "heat_plot",
           "distribution_plot", "trace_rank_plot", "prior_posterior_plot", "save_figure",
           "png_bytes", "svg_text", "isotope_plot", "siderophile_plot", "SIDEROPHILE_PANEL",
           "predictive_plot", "parameter_label", "SINGLE_COLUMN", "DOUBLE_COLUMN"]

#: Figure widths [in]: one and two journal columns (common practice).
SINGLE_COLUMN = 3.5
DOUBLE_COLUMN = 7.2


def _width(natural: float) -> float:
    """The journal width nearest above a figure's natural width (3.5 or 7.2 in)."""
    return SINGLE_COLUMN if natural <= SINGLE_COLUMN + 1.0 else DOUBLE_COLUMN


#: Sampled parameters as readers know them (mathtext symbols, units).
_PARAM_LABELS = {
    "T0": r"$T_0$ [K]", "slope": "slope [dex/K]", "log10_floor": "floor [dex]",
    "a": r"$a$", "b": r"$b$", "T50": r"$T_{50}$ [K]", "width": "width [K]",
    "slope_offset": "slope offset [dex/K]", "lam": r"$\lambda_{\mathrm{late}}$ [kg/kg]",
    "cmf": "core mass fraction", "tau": r"$\tau$ [dex]",
}


def _symbol(name: str) -> str:
    """``T0`` as ``$T_0$``, ``T50`` as ``$T_{50}$`` (subscripted symbols); other names as
    they are."""
    import re

    m = re.fullmatch(r"([A-Za-z])(\d+)", name)
    return rf"${m.group(1)}_{{{m.group(2)}}}$" if m else name


def parameter_label(name: str) -> str:
    """An axis label for a sampled parameter: ``$T_0$ [K]``, ``slope [dex/K]``,
    ``mass fraction of CI`` (``x_CI``), ``weight of CI`` (``w_CI``)."""
    if name in _PARAM_LABELS:
        return _PARAM_LABELS[name]
    if name.startswith("x_"):
        return f"mass fraction of {name[2:]}"
    if name.startswith("w_"):
        return f"weight of {name[2:]}"
    return name

#: The eight colours of Okabe & Ito (2008, "Color Universal Design").
OKABE_ITO = {
    "black": "#000000", "orange": "#E69F00", "sky": "#56B4E9", "green": "#009E73",
    "yellow": "#F0E442", "blue": "#0072B2", "vermillion": "#D55E00", "purple": "#CC79A7",
}

#: Geochemical class -> (colour, marker, legend label).
CLASS_STYLE: dict[str, tuple[str, str, str]] = {
    "lithophile": (OKABE_ITO["blue"], "o", "lithophile"),
    "siderophile_moderate": (OKABE_ITO["orange"], "s", "moderately siderophile"),
    "siderophile_highly": (OKABE_ITO["vermillion"], "D", "highly siderophile"),
    "chalcophile": (OKABE_ITO["green"], "^", "chalcophile"),
    "atmophile": (OKABE_ITO["purple"], "v", "atmophile"),
}
_UNKNOWN_STYLE = ("#777777", "x", "other")
_SERIES = [OKABE_ITO[k] for k in ("blue", "orange", "green", "vermillion", "sky", "purple",
                                  "yellow", "black")]
_COSMO_ORDER = ("refractory", "main_component", "moderately_volatile", "highly_volatile")
_COSMO_LABEL = {"refractory": "refractory", "main_component": "main\ncomponent",
                "moderately_volatile": "moderately volatile",
                "highly_volatile": "highly volatile"}

_RC = {
    "figure.dpi": 110, "savefig.dpi": 300, "font.size": 9, "axes.titlesize": 10,
    "axes.labelsize": 9, "axes.spines.top": False, "axes.spines.right": False,
    "axes.grid": True, "grid.color": "#e4e4e4", "grid.linewidth": 0.6,
    "axes.axisbelow": True, "legend.frameon": False, "legend.fontsize": 8,
    "xtick.labelsize": 8, "ytick.labelsize": 8, "svg.fonttype": "none", "pdf.fonttype": 42,
    "axes.prop_cycle": matplotlib.cycler(color=_SERIES),
    "font.family": "DejaVu Sans",
}


@contextlib.contextmanager
def plot_style() -> Iterator[None]:
    """Context in which planetmix figures are drawn (rcParams kept local)."""
    with matplotlib.rc_context(_RC):
        yield


def _log_ratio_axis(ax, lo_dex: float, hi_dex: float) -> None:
    """A logarithmic y axis of a normalised abundance from ``10**lo_dex`` to ``10**hi_dex``.

    Over 2.5 decades or more: decades labelled ``10^n`` with unlabelled minor ticks at
    2-9; over a narrower range: ticks at 1, 2 and 5 times the decades, labelled as
    decimals (0.05, 0.1, 0.2...), so that the axis always carries several labels.
    """
    from matplotlib.ticker import FuncFormatter, LogFormatterSciNotation, LogLocator, NullFormatter

    ax.set_yscale("log")
    ax.set_ylim(10.0 ** lo_dex, 10.0 ** hi_dex)
    ax.yaxis.set_minor_locator(LogLocator(base=10.0, subs=np.arange(2, 10), numticks=12))
    ax.yaxis.set_minor_formatter(NullFormatter())
    if hi_dex - lo_dex >= 2.5:
        ax.yaxis.set_major_locator(LogLocator(base=10.0, numticks=12))
        ax.yaxis.set_major_formatter(LogFormatterSciNotation(base=10.0))
    else:
        ax.yaxis.set_major_locator(LogLocator(base=10.0, subs=(1.0, 2.0, 5.0), numticks=12))
        ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v:.4g}"))


def _element_props(elements: Sequence[str]) -> pd.DataFrame:
    props = components.elements()
    return props.reindex(list(elements))


def _class_style(cls: object) -> tuple[str, str, str]:
    return CLASS_STYLE.get(str(cls), _UNKNOWN_STYLE)


def _cosmo_bands(tc_column: str = "tc50_lodders2003") -> list[tuple[str, float, float]]:
    """Temperature ranges of the cosmochemical classes, from the element table.

    Boundaries are placed midway between the hottest element of one class and the coolest
    of the next hotter class.
    """
    props = components.elements()
    col = tc_column if tc_column in props.columns else "tc50_lodders2003"
    rng = props.groupby("cosmochemical_class")[col].agg(["min", "max"])
    classes = [c for c in _COSMO_ORDER if c in rng.index]
    bands = []
    for i, c in enumerate(classes):
        hi = 2100.0 if i == 0 else 0.5 * (rng.loc[classes[i - 1], "min"] + rng.loc[c, "max"])
        lo = (0.0 if i == len(classes) - 1
              else 0.5 * (rng.loc[c, "min"] + rng.loc[classes[i + 1], "max"]))
        bands.append((c, float(lo), float(hi)))
    return bands


def volatility_diagram(
    residuals: pd.DataFrame,
    *,
    reference: str = "Mg",
    volatility: Mapping[str, object] | None = None,
    volatility_draws: np.ndarray | None = None,
    tc_table: str = "lodders2003",
    title: str | None = None,
    interval_label: str = "90% credible interval",
    normaliser: str = "CI",
) -> Figure:
    """The volatility diagram (docs/model.md section 1).

    Parameters
    ----------
    residuals : DataFrame
        Columns ``element``, ``tc50`` [K], ``observed`` and ``model`` (log10 of the
        normaliser- and
        reference-normalised abundance, dex), ``sigma`` [dex], ``fitted`` (bool), ``flag``
        (text; non-empty and not ``not observed`` marks an outlier). Optional ``model_lo``
        and ``model_hi`` (dex) give a credible interval of the model per element.
    reference : str
        The reference element R.
    volatility : mapping, optional
        ``{"form": name, <param>: value, ...}``: the fitted volatility curve is drawn,
        shifted to the lithophile model level.
    volatility_draws : ndarray (S, p), optional
        Posterior draws of the volatility parameters: a credible band around the curve.
    tc_table : str
        Name of the condensation-temperature table (axis label and class bands).
    title : str, optional
    interval_label : str
        Legend text of the model's interval.
    normaliser : str
        Name of the normalising composition of ``observed`` and ``model`` (the y-axis
        label; the fit's ``normaliser``, CI unless the case names another).

    Returns
    -------
    Figure
    """
    df = residuals.copy()
    df = df[np.isfinite(df["tc50"].astype(float))]
    props = _element_props(df["element"])
    df["geo"] = props["geochemical_class"].to_numpy()
    tc_all = df["tc50"].astype(float).to_numpy()
    x_lo = max(0.0, float(np.nanmin(tc_all)) - 60.0) if tc_all.size else 0.0
    x_hi = 1900.0
    from .diagram import _place_labels, _tc_label

    band_texts = []
    with plot_style():
        fig, ax = plt.subplots(figsize=(7.2, 4.6), layout="constrained")
        for cls, lo, hi in _cosmo_bands(f"tc50_{tc_table}"):
            lo, hi = max(lo, x_lo), min(hi, x_hi)
            if hi <= lo:
                continue
            shade = "#f3f3f3" if _COSMO_ORDER.index(cls) % 2 == 0 else "#ffffff"
            ax.axvspan(lo, hi, color=shade, zorder=0, lw=0)
            ax.axvline(lo, color="#cfcfcf", lw=0.6, zorder=0)
            if hi - lo < 60:
                continue
            band_texts.append(ax.text(0.5 * (lo + hi), 0.985,
                                      _COSMO_LABEL.get(cls, cls),
                                      transform=ax.get_xaxis_transform(), ha="center",
                                      va="top", fontsize=7, color="#555555", zorder=1))
        ax.axhline(1.0, color="#888888", lw=0.8, ls=":", zorder=1)
        model = df["model"].astype(float).to_numpy()
        tc = df["tc50"].astype(float).to_numpy()
        # the fitted pattern: per-element model values (and intervals when available)
        if {"model_lo", "model_hi"} <= set(df.columns):
            lo = df["model_lo"].astype(float).to_numpy()
            hi = df["model_hi"].astype(float).to_numpy()
            ax.vlines(tc, 10.0 ** lo, 10.0 ** hi, color="#9a9a9a", lw=5, alpha=0.55, zorder=2,
                      label=f"model, {interval_label}")
        seen_obs = np.isfinite(df["observed"].astype(float).to_numpy())
        ok = np.isfinite(model) & seen_obs
        if ok.any():
            ax.scatter(tc[ok], 10.0 ** model[ok], marker="_", s=110, color="black", lw=1.4,
                       zorder=3, label="model (each element)")
        un = np.isfinite(model) & ~seen_obs
        if un.any():
            ax.scatter(tc[un], 10.0 ** model[un], marker="_", s=90, color="#b5b5b5", lw=1.2,
                       zorder=2.8, label="model, element not in the target")
        if volatility is not None and volatility.get("form"):
            _volatility_curve(ax, df, volatility, volatility_draws, interval_label,
                              (x_lo, x_hi))
        obs = df["observed"].astype(float).to_numpy()
        sig = df["sigma"].astype(float).to_numpy()
        fitted = df["fitted"].astype(str).str.lower().isin(["true", "1"]).to_numpy()
        has = np.isfinite(obs)
        geo = df["geo"].astype(str).to_numpy()
        for cls in list(CLASS_STYLE) + ["other"]:
            in_cls = has & ((geo == cls) if cls != "other" else ~np.isin(geo, list(CLASS_STYLE)))
            if not in_cls.any():
                continue
            colour, marker, label = _class_style(cls)
            for fit_state in (True, False):
                m = in_cls & (fitted == fit_state)
                if not m.any():
                    continue
                s_m = np.nan_to_num(sig[m])
                # a symmetric bar in dex is asymmetric in the ratio
                ax.errorbar(tc[m], 10.0 ** obs[m], yerr=[10.0 ** obs[m] * (1 - 10.0 ** -s_m),
                                                          10.0 ** obs[m] * (10.0 ** s_m - 1)],
                            fmt=marker, ms=5.5, color=colour,
                            mfc=colour if fit_state else "white", mec=colour, ecolor=colour,
                            elinewidth=0.9, capsize=0, zorder=4,
                            label=label if fit_state or not (in_cls & fitted).any() else None)
        flags = df.get("flag", pd.Series([""] * len(df), index=df.index)).fillna("")
        out = np.flatnonzero(flags.astype(str).isin(["above model", "below model"]).to_numpy()
                             & np.isfinite(obs))
        out_text: dict[str, str] = {}
        for i in out:
            ax.scatter(tc[i], 10.0 ** obs[i], s=70, facecolors="none",
                       edgecolors=OKABE_ITO["black"], lw=1.0, zorder=6)
            z = df["z"].iloc[i] if "z" in df.columns else np.nan
            out_text[df["element"].iloc[i]] = f"{df['element'].iloc[i]} ({float(z):+.1f}σ)"
        if len(out):
            ax.scatter([], [], s=110, facecolors="none", edgecolors="black",
                       label="flagged outlier (|z| > 3)")
        if (has & ~fitted).any():
            ax.scatter([], [], marker="o", s=25, facecolors="white", edgecolors="#555555",
                       label="not fitted (open symbol)")
        # the y range follows the data and the model values, never the trend curve
        vals = np.concatenate([obs[has] - np.nan_to_num(sig[has]),
                               obs[has] + np.nan_to_num(sig[has]), model[np.isfinite(model)]])
        y0, y1 = float(np.min(vals)), float(np.max(vals))
        pad = 0.08 * max(y1 - y0, 0.5)
        _log_ratio_axis(ax, y0 - pad, y1 + 2.5 * pad)  # room for the class labels
        ax.set_xlim(x_hi, x_lo)
        ax.set_xlabel(_tc_label(tc_table) + "; hot on the left")
        r = r"\mathrm{" + reference + "}"
        n = r"\mathrm{" + normaliser.replace("_", r"\_").replace(" ", r"\ ") + "}"
        ax.set_ylabel(rf"$(\mathrm{{X}}/{r})_{{\mathrm{{sample}}}}\,/\,"
                      rf"(\mathrm{{X}}/{r})_{{{n}}}$")
        if title:
            ax.set_title(title, loc="left", fontsize=9)
        handles, labels = ax.get_legend_handles_labels()
        fig.legend(handles, labels, loc="outside lower center", ncols=2, fontsize=7)
        fig.canvas.draw()
        fig.set_layout_engine("none")
        # label placement in the axis' data units (the ratio, not dex)
        pts = pd.DataFrame({"element": df["element"].to_numpy()[has], "tc50": tc[has],
                            "y": 10.0 ** obs[has]})
        obst = np.vstack([np.column_stack([tc[has], 10.0 ** obs[has]]),
                          np.column_stack([tc[np.isfinite(model)],
                                           10.0 ** model[np.isfinite(model)]])])
        _place_labels(fig, ax, pts, 6.0, 7.5, band_texts, obst, texts=out_text,
                      styles={e: {"fontweight": "bold"} for e in out_text})
    return fig


def _volatility_curve(ax, df: pd.DataFrame, volatility: Mapping[str, object],
                      draws: np.ndarray | None, interval_label: str,
                      x_range: tuple[float, float] = (60.0, 1900.0)) -> None:
    from .volatility import FORMS

    form = str(volatility["form"])
    if form not in FORMS:
        return
    names = FORMS[form].params
    try:
        params = np.array([[float(volatility[k]) for k in names]])
    except (KeyError, TypeError, ValueError):
        return
    if not np.all(np.isfinite(params)):
        return
    grid = np.linspace(max(x_range[0], 20.0), x_range[1], 400)
    tc = df["tc50"].astype(float).to_numpy()
    lith = (df["geo"] == "lithophile").to_numpy() & np.isfinite(df["model"].astype(float))
    if not lith.any():
        lith = np.isfinite(df["model"].astype(float)).to_numpy()
    # shift so that the curve passes through the lithophile model points
    curve_at = log10_retained(form, params, tc[lith])[0]
    shift = float(np.median(df["model"].astype(float).to_numpy()[lith] - curve_at))
    curve = log10_retained(form, params, grid)[0] + shift
    if draws is not None and len(draws):
        d = np.asarray(draws, dtype=float)
        d = d[np.all(np.isfinite(d), axis=1)]
        if len(d):
            band = log10_retained(form, d, grid) + shift
            lo, hi = np.percentile(band, [5, 95], axis=0)
            ax.fill_between(grid, 10.0 ** lo, 10.0 ** hi, color=OKABE_ITO["sky"], alpha=0.35,
                            lw=0, zorder=2,
                            label=f"volatility trend, {interval_label}")
    units = dict(zip(names, FORMS[form].units, strict=True))
    txt = ", ".join(f"{_symbol(k)} = {float(volatility[k]):.4g}"
                    f"{'' if units[k] == '1' else ' ' + units[k]}" for k in names)
    ax.plot(grid, 10.0 ** curve, color=OKABE_ITO["sky"], lw=2.0, zorder=2.5,
            label=f"volatility trend ({form}: {txt})")


def residuals_plot(residuals: pd.DataFrame, *, title: str | None = None,
                   threshold: float = 3.0) -> Figure:
    """Residual z-scores by element, ordered by condensation temperature (hot first).

    Parameters
    ----------
    residuals : DataFrame
        Columns ``element``, ``tc50``, ``z`` (observed minus model over sigma) and
        ``fitted``.
    threshold : float
        |z| above which an element is flagged (dashed lines).
    """
    df = residuals[np.isfinite(residuals["z"].astype(float))].copy()
    df = df.sort_values("tc50", ascending=False, na_position="last")
    geo = _element_props(df["element"])["geochemical_class"].to_numpy()
    fitted = df["fitted"].astype(str).str.lower().isin(["true", "1"]).to_numpy()
    z = df["z"].astype(float).to_numpy()
    with plot_style():
        fig, ax = plt.subplots(figsize=(DOUBLE_COLUMN, 3.4), layout="constrained")
        x = np.arange(len(df))
        geo = np.asarray(geo, dtype=str)
        for cls in list(CLASS_STYLE) + ["other"]:
            in_cls = (geo == cls) if cls != "other" else ~np.isin(geo, list(CLASS_STYLE))
            if not in_cls.any():
                continue
            colour, marker, label = _class_style(cls)
            ax.vlines(x[in_cls], 0, z[in_cls], color=colour, lw=1.4, alpha=0.8)
            for fit_state in (True, False):
                m = in_cls & (fitted == fit_state)
                if m.any():
                    ax.plot(x[m], z[m], marker=marker, color=colour,
                            mfc=colour if fit_state else "white", ms=5, ls="none",
                            label=label if fit_state or not (in_cls & fitted).any() else None)
        for t in (-threshold, threshold):
            ax.axhline(t, color=OKABE_ITO["vermillion"], lw=0.9, ls="--")
        ax.axhspan(-1, 1, color="#eeeeee", zorder=0)
        ax.axhline(0, color="#555555", lw=0.8)
        ax.set_xticks(x, df["element"], rotation=90, fontsize=7 if len(df) <= 40 else 5.5)
        ax.set_xlim(-1, len(df))
        ax.grid(axis="x", visible=False)
        ax.set_ylabel(r"$z = (y_{\mathrm{obs}} - y_{\mathrm{model}})\,/\,\sigma$")
        ax.set_xlabel("element, ordered by 50% condensation temperature (hot on the left); "
                      "open symbols not fitted")
        if title:
            ax.set_title(title, loc="left")
        fig.legend(loc="outside lower center", ncols=5, fontsize=7)
    return fig


def predictive_plot(table: pd.DataFrame, *, title: str | None = None,
                    interval_label: str = "90%") -> Figure:
    """Observed values against their posterior-predictive intervals, element by element.

    Each element's replicated observations (drawn from the likelihood at each posterior
    draw) give a predictive distribution; the figure shows it as its 50% and outer
    interval around the predictive median, with the observed value as a symbol. All is
    drawn relative to the predictive median, so elements of any abundance share one
    axis. An observed value outside the outer interval is ringed; about a tenth of them
    outside a 90% interval is what a model that describes the data gives.

    Parameters
    ----------
    table : DataFrame
        ``element``, ``tc50`` [K], ``observed``, ``pp_lo``, ``pp_q25``, ``pp_q50``,
        ``pp_q75``, ``pp_hi`` [dex: log10 of the normalised abundance].
    interval_label : str
        The outer interval (legend).
    """
    df = table.sort_values("tc50", ascending=False, na_position="last").reset_index(drop=True)
    geo = np.asarray(_element_props(df["element"])["geochemical_class"].to_numpy(), dtype=str)
    med = df["pp_q50"].to_numpy(float)
    obs = df["observed"].to_numpy(float) - med
    lo, hi = df["pp_lo"].to_numpy(float) - med, df["pp_hi"].to_numpy(float) - med
    q25, q75 = df["pp_q25"].to_numpy(float) - med, df["pp_q75"].to_numpy(float) - med
    outside = (obs < lo) | (obs > hi)
    x = np.arange(len(df))
    with plot_style():
        fig, ax = plt.subplots(figsize=(DOUBLE_COLUMN, 3.4), layout="constrained")
        ax.vlines(x, lo, hi, color="#c8c8c8", lw=4.0, zorder=2,
                  label=f"posterior-predictive {interval_label} interval")
        ax.vlines(x, q25, q75, color="#7f7f7f", lw=4.0, zorder=2.2,
                  label="posterior-predictive 50% interval")
        ax.axhline(0.0, color="#555555", lw=0.8, zorder=1)
        for cls in list(CLASS_STYLE) + ["other"]:
            m = (geo == cls) if cls != "other" else ~np.isin(geo, list(CLASS_STYLE))
            if m.any():
                colour, marker, label = _class_style(cls)
                ax.plot(x[m], obs[m], marker=marker, color=colour, ms=4.5, ls="none",
                        zorder=4, label=f"observed, {label}")
        if outside.any():
            ax.scatter(x[outside], obs[outside], s=60, facecolors="none",
                       edgecolors="black", lw=0.9, zorder=5,
                       label=f"outside its {interval_label} interval")
        ax.set_xticks(x, df["element"], rotation=90, fontsize=7 if len(df) <= 40 else 5.5)
        for tick, out in zip(ax.get_xticklabels(), outside, strict=True):
            if out:
                tick.set_fontweight("bold")
        ax.set_xlim(-1, len(df))
        ax.grid(axis="x", visible=False)
        ax.set_ylabel(r"$y - \tilde{y}_{\mathrm{pred}}$ [dex]")
        ax.set_xlabel("element, ordered by 50% condensation temperature (hot on the left); "
                      r"$\tilde{y}_{\mathrm{pred}}$: posterior-predictive median")
        if title:
            ax.set_title(title, loc="left")
        fig.legend(loc="outside lower center", ncols=3, fontsize=7)
    return fig


def weights_plot(weights: Mapping[str, float], *,
                 mass_fractions: Mapping[str, float] | None = None,
                 draws: pd.DataFrame | None = None, basis: str = "Mg",
                 title: str | None = None) -> Figure:
    """Building-block weights: bars of the point estimates, or posterior distributions.

    Parameters
    ----------
    weights : mapping
        Component -> weight on the reference-element basis (the point estimate).
    mass_fractions : mapping, optional
        Component -> mass fraction of the bulk (a second bar per component).
    draws : DataFrame, optional
        Posterior draws, one column per component (weights): drawn as violins with the
        5-95% interval.
    basis : str
        The reference element of the weights.
    """
    names = list(weights)
    with plot_style():
        fig, ax = plt.subplots(figsize=(_width(0.8 * len(names) + 1.5), 3.0),
                               layout="constrained")
        x = np.arange(len(names))
        if draws is not None and len(draws) and set(names) <= set(draws.columns):
            data = [np.asarray(draws[n], dtype=float) for n in names]
            parts = ax.violinplot(data, positions=x, showextrema=False, widths=0.7)
            for body, colour in zip(parts["bodies"], _SERIES, strict=False):
                body.set_facecolor(colour)
                body.set_alpha(0.45)
            lo = [np.percentile(d, 5) for d in data]
            hi = [np.percentile(d, 95) for d in data]
            med = [np.median(d) for d in data]
            ax.errorbar(x, med, yerr=[np.subtract(med, lo), np.subtract(hi, med)], fmt="o",
                        color="black", ms=4, capsize=3, label="median, 5-95%")
        else:
            wv = [float(weights[n]) for n in names]
            width = 0.38 if mass_fractions else 0.6
            ax.bar(x - (width / 2 if mass_fractions else 0), wv, width,
                   color=[_SERIES[i % len(_SERIES)] for i in range(len(names))],
                   label=f"weight ({basis} basis)")
            if mass_fractions:
                mv = [float(mass_fractions.get(n, np.nan)) for n in names]
                ax.bar(x + width / 2, mv, width, color="white", hatch="///",
                       edgecolor=[_SERIES[i % len(_SERIES)] for i in range(len(names))],
                       label="mass fraction")
            for i, v in enumerate(wv):
                ax.text(x[i] - (width / 2 if mass_fractions else 0), v + 0.01, f"{v:.3f}",
                        ha="center", va="bottom", fontsize=7.5)
        ax.set_xticks(x, names)
        ax.set_ylim(0, 1.08)
        ax.set_ylabel("fraction")
        if title:
            ax.set_title(title, loc="left")
        ax.legend(loc="upper right")
    return fig


def pair_plot(draws: pd.DataFrame, *, columns: Sequence[str] | None = None,
              max_params: int = 6, max_points: int = 2000,
              truth: Mapping[str, float] | None = None) -> Figure:
    """Pairwise posterior of the main parameters (histograms on the diagonal).

    Parameters
    ----------
    draws : DataFrame
        One row per posterior draw, one column per parameter.
    columns : sequence of str, optional
        The parameters (default: the first ``max_params`` numeric columns that vary).
    truth : mapping, optional
        Known values to mark (simulate-then-recover checks).
    """
    if columns is None:
        num = draws.select_dtypes("number")
        columns = [c for c in num.columns if np.nanstd(num[c].to_numpy()) > 0][:max_params]
    columns = list(columns)
    n = len(columns)
    data = draws[columns].to_numpy(dtype=float)
    if len(data) > max_points:
        idx = np.random.default_rng(0).choice(len(data), max_points, replace=False)
        data_s = data[idx]
    else:
        data_s = data
    with plot_style():
        size = _width(1.3 * n)
        fig, axes = plt.subplots(n, n, figsize=(size, size), squeeze=False)
        fig.subplots_adjust(left=0.1, right=0.97, bottom=0.08, top=0.95, wspace=0.12,
                            hspace=0.3)
        for i in range(n):
            for j in range(n):
                ax = axes[i, j]
                ax.grid(False)
                if j > i:
                    ax.set_axis_off()
                    continue
                if i == j:
                    ax.hist(data[:, i], bins=30, color=OKABE_ITO["blue"], alpha=0.75)
                    ax.set_yticks([])
                    q = np.nanpercentile(data[:, i], [5, 50, 95])
                    for v, ls in zip(q, (":", "-", ":"), strict=True):
                        ax.axvline(v, color="black", lw=0.8, ls=ls)
                    ax.set_title(f"{q[1]:.4g} [{q[0]:.4g}, {q[2]:.4g}]", fontsize=6.5)
                else:
                    ax.scatter(data_s[:, j], data_s[:, i], s=2, alpha=0.3,
                               color=OKABE_ITO["blue"], rasterized=True)
                if truth:
                    if columns[j] in truth:
                        ax.axvline(truth[columns[j]], color=OKABE_ITO["vermillion"], lw=1)
                    if i != j and columns[i] in truth:
                        ax.axhline(truth[columns[i]], color=OKABE_ITO["vermillion"], lw=1)
                ax.tick_params(labelsize=6)
                if i == n - 1:
                    ax.set_xlabel(parameter_label(columns[j]), fontsize=7)
                else:
                    ax.set_xticklabels([])
                if j == 0 and i != 0:
                    ax.set_ylabel(parameter_label(columns[i]), fontsize=7)
                elif i != j:
                    ax.set_yticklabels([])
    return fig


def ranking_plot(table: pd.DataFrame, *, criterion: str | None = None, top: int = 15,
                 title: str | None = None) -> Figure:
    """The hypothesis ranking as a chart: difference of the criterion from the best.

    Parameters
    ----------
    table : DataFrame
        One row per hypothesis with ``components``, ``status`` and the criterion column
        (``bic``, ``aic`` or ``elpd_loo``; with ``elpd_loo``, higher is better and ``se``
        or ``dse`` columns, when present, give error bars).
    criterion : str, optional
        Default: ``elpd_loo`` when present, else ``bic``.
    top : int
        Hypotheses shown.
    """
    t = table.copy()
    if criterion is None:
        criterion = next(c for c in ("elpd_loo", "bic", "aic", "chi2") if c in t.columns)
    higher_better = criterion.startswith("elpd")
    status = t["status"].astype(str) if "status" in t.columns else pd.Series(
        ["optimal"] * len(t), index=t.index)
    vals = pd.to_numeric(t[criterion], errors="coerce")
    ok = (status != "infeasible") & np.isfinite(vals)
    best = vals[ok].max() if higher_better else vals[ok].min()
    delta = (best - vals) if higher_better else (vals - best)
    t = t.assign(_delta=delta, _ok=ok)
    t = pd.concat([t[t["_ok"]].sort_values("_delta"), t[~t["_ok"]]]).head(top)
    labels = t["components"].astype(str).str.replace("+", " + ", regex=False).tolist()
    with plot_style():
        fig, ax = plt.subplots(figsize=(DOUBLE_COLUMN, 0.32 * len(t) + 1.4),
                               layout="constrained")
        y = np.arange(len(t))[::-1]
        d = t["_delta"].to_numpy(dtype=float)
        finite_max = np.nanmax(d[t["_ok"].to_numpy()]) if t["_ok"].any() else 1.0
        symlog = finite_max > 60

        def text_x(v: float) -> float:
            return v * 1.06 + 0.15 if symlog else v + finite_max * 0.01
        for yi, di, okk in zip(y, d, t["_ok"], strict=True):
            if okk:
                colour = (OKABE_ITO["green"] if di <= 2 else OKABE_ITO["orange"] if di <= 10
                          else OKABE_ITO["vermillion"])
                ax.barh(yi, max(di, 0.03 if symlog else finite_max * 0.004), color=colour,
                        height=0.7)
                ax.text(text_x(max(di, 0)), yi, f"{di:.1f}", va="center",
                        fontsize=7)
            else:
                ax.barh(yi, finite_max or 1.0, color="white", edgecolor="#999999",
                        hatch="xx", height=0.7)
                ax.text(text_x(0.0), yi, "infeasible", va="center", fontsize=7.5,
                        color="#444444", bbox={"facecolor": "white", "edgecolor": "none",
                                               "pad": 1.0})
        if higher_better:
            for col in ("dse", "se"):
                if col in t.columns:
                    e = pd.to_numeric(t[col], errors="coerce").to_numpy()
                    ax.errorbar(d, y, xerr=e, fmt="none", ecolor="black", capsize=2, lw=0.8)
                    break
        if symlog:
            # keep the small differences that matter visible next to very large ones
            ax.set_xscale("symlog", linthresh=10.0)
            ax.set_xlim(0, finite_max * 1.8)
        ax.set_yticks(y, labels, fontsize=8)
        name = {"bic": "BIC", "aic": "AIC", "chi2": "chi2",
                "elpd_loo": "elpd (PSIS-LOO)"}.get(criterion, criterion)
        scale_note = "\naxis linear to 10, logarithmic above" if symlog else ""
        ax.set_xlabel(f"Δ{name} from the best hypothesis (0 = best; green ≤ 2, orange ≤ 10, "
                      f"red > 10){scale_note}")
        ax.grid(axis="y", visible=False)
        if title:
            ax.set_title(title, loc="left")
    return fig


def _intervals(df: pd.DataFrame) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    v = df["value"].to_numpy(dtype=float)
    if {"lo", "hi"} <= set(df.columns):
        lo = df["lo"].to_numpy(dtype=float)
        hi = df["hi"].to_numpy(dtype=float)
        return v, np.clip(v - lo, 0, None), np.clip(hi - v, 0, None)
    z = np.zeros_like(v)
    return v, z, z


#: Mantle oxides at or above this level [wt%] are drawn as bars; the rest are trace
#: elements, reported in ppm or ppb (see :func:`inversion.report`).
MAJOR_OXIDE_MIN_WT = 0.01


def planet_plot(planet: pd.DataFrame, *, reference: Mapping[str, tuple[float, str]] | None = None,
                title: str | None = None) -> Figure:
    """Whole-planet composition: the mantle's major and minor oxides and the core.

    Ratios and the core mass fraction are numbers of different kinds: the reports give
    them as a table, not on a shared axis.

    Parameters
    ----------
    planet : DataFrame
        Tidy table with ``reservoir`` (mantle, core, ratio, planet), ``species``, ``value``,
        ``unit`` and optionally ``lo``/``hi`` (an interval, same unit).
    reference : mapping, optional
        Species -> (value, label) of known values to mark with a star (e.g. the
        primitive mantle's MgO).
    """
    reference = dict(reference or {})
    mant = planet[(planet["reservoir"] == "mantle") & (planet["unit"] == "wt%")]
    mant = mant[mant["value"].astype(float) >= MAJOR_OXIDE_MIN_WT]
    mant = mant.sort_values("value", ascending=False)
    core = planet[(planet["reservoir"] == "core")].sort_values("value", ascending=False)
    core = core.head(8)
    with plot_style():
        fig, axs = plt.subplots(1, 2, figsize=(7.2, 3.2), layout="constrained",
                                gridspec_kw={"width_ratios": [max(len(mant), 1),
                                                              max(len(core), 1) + 1]})
        for ax, df, what, colour in ((axs[0], mant, "mantle: oxides ≥ "
                                      f"{MAJOR_OXIDE_MIN_WT:g} wt%", OKABE_ITO["blue"]),
                                     (axs[1], core, "core: leading elements",
                                      OKABE_ITO["orange"])):
            if len(df):
                v, lo, hi = _intervals(df)
                x = np.arange(len(df))
                ax.bar(x, v, color=colour, alpha=0.85, width=0.7)
                if np.any(lo + hi > 0):
                    ax.errorbar(x, v, yerr=[lo, hi], fmt="none", ecolor="black", capsize=2,
                                lw=0.8)
                for xi, sp in zip(x, df["species"], strict=True):
                    if sp in reference:
                        ax.plot(xi, reference[sp][0], marker="*", ms=8, color="black",
                                ls="none")
                ax.set_yscale("log")
                ax.set_xticks(x, [_subscript(str(sp)) for sp in df["species"]], fontsize=7.5,
                              rotation=45 if len(df) > 8 else 0, ha="right" if len(df) > 8
                              else "center", rotation_mode="anchor")
                ax.set_ylabel("wt%")
                ax.set_ylim(float(np.min(v)) / 2.5, float(np.max(v + hi)) * 3.0)
                for xi, vi, top in zip(x, v, v + hi, strict=True):
                    ax.text(xi, top * 1.15, f"{vi:.3g}", ha="center", fontsize=6.0,
                            rotation=90 if len(df) > 8 else 0, va="bottom")
            else:
                ax.text(0.5, 0.5, "no values", transform=ax.transAxes, ha="center")
            ax.grid(axis="x", visible=False)
            ax.set_title(what, loc="left", fontsize=9)
        if title:
            fig.suptitle(title, x=0.01, ha="left", fontsize=9)
    return fig


def _subscript(species: str) -> str:
    """``Al2O3`` as mathtext with subscripted counts."""
    import re

    if not re.fullmatch(r"[A-Za-z0-9]+", species) or not any(ch.isdigit() for ch in species):
        return species
    return "$\\mathrm{" + re.sub(r"(\d+)", r"_{\1}", species) + "}$"


def _isotope_label(name: str) -> str:
    """``238U`` as mathtext with the mass number as a superscript."""
    import re

    m = re.fullmatch(r"(\d+)([A-Z][a-z]?)", name)
    return rf"$^{{{m.group(1)}}}\mathrm{{{m.group(2)}}}$" if m else name


def heat_plot(heat: pd.DataFrame, *, unit: str = "TW", title: str | None = None,
              interval_label: str = "90% interval") -> Figure:
    """Radiogenic heat production through time.

    Parameters
    ----------
    heat : DataFrame
        ``time_Gyr_ago`` and one column per isotope (``238U``, ``235U``, ``232Th``,
        ``40K``) in ``unit``; a ``total`` column is drawn in black; optional
        ``total_lo``/``total_hi`` give an interval.
    """
    t = heat["time_Gyr_ago"].to_numpy(dtype=float)
    iso = [c for c in heat.columns if c in ("238U", "235U", "232Th", "40K")]
    with plot_style():
        fig, ax = plt.subplots(figsize=(DOUBLE_COLUMN, 3.6), layout="constrained")
        for c, colour, ls in zip(iso, (OKABE_ITO["blue"], OKABE_ITO["sky"], OKABE_ITO["green"],
                                       OKABE_ITO["orange"]), ("-", "--", "-.", ":"),
                                 strict=False):
            # isotope names with the mass number as a superscript: 238U as ^238U
            ax.plot(t, heat[c], color=colour, lw=1.6, ls=ls, label=_isotope_label(c))
        if "total" in heat.columns:
            if {"total_lo", "total_hi"} <= set(heat.columns):
                ax.fill_between(t, heat["total_lo"], heat["total_hi"], color="#bbbbbb",
                                alpha=0.5, lw=0, label=f"total, {interval_label}")
            now = float(heat["total"].iloc[int(np.argmin(t))])
            # today's value in the legend: a label on the curve ran into the curve and band
            ax.plot(t, heat["total"], color="black", lw=2.0,
                    label=f"total (today {now:.3g} {unit})")
        ax.set_xlim(t.max(), t.min())
        ax.set_xlabel("time before present [Gyr]")
        ax.set_ylabel(f"heat production [{unit}]")
        if title:
            ax.set_title(title, loc="left")
        ax.legend(loc="upper right")
    return fig


def distribution_plot(values: pd.DataFrame, *, columns: Sequence[str] | None = None,
                      reference: Mapping[str, tuple[float, str]] | None = None,
                      title: str | None = None) -> Figure:
    """Histograms of planet properties across a catalogue (one panel per property).

    Parameters
    ----------
    values : DataFrame
        One row per star (or draw), one column per property.
    reference : mapping, optional
        Column -> (value, label) drawn as a dashed line (e.g. the Earth).
    """
    cols = list(columns or values.select_dtypes("number").columns)
    reference = dict(reference or {})
    with plot_style():
        fig, axs = plt.subplots(1, len(cols), figsize=(_width(2.4 * len(cols)), 2.8),
                                squeeze=False, layout="constrained")
        for ax, c, colour in zip(axs[0], cols, _SERIES, strict=False):
            v = pd.to_numeric(values[c], errors="coerce").dropna().to_numpy()
            if v.size:
                ax.hist(v, bins=min(40, max(8, v.size // 5)), color=colour, alpha=0.8)
                q = np.percentile(v, [5, 50, 95])
                ax.set_title(f"{c}\nmedian {q[1]:.3g} [{q[0]:.3g}, {q[2]:.3g}]", fontsize=8)
            else:
                ax.set_title(c, fontsize=8)
            if c in reference:
                ax.axvline(reference[c][0], color="black", ls="--", lw=1,
                           label=reference[c][1])
                ax.legend(loc="upper right")
            ax.set_yticks([])
        if title:
            fig.suptitle(title, x=0.01, ha="left")
    return fig


def trace_rank_plot(chains: Mapping[str, np.ndarray], *, title: str | None = None) -> Figure:
    """Trace of every chain (left) and rank histograms per chain (right), per parameter.

    Rank histograms: the draws of all chains pooled and ranked; each chain's ranks
    binned. Well-mixed chains give flat, overlapping histograms (Vehtari et al. 2021).

    Parameters
    ----------
    chains : mapping
        Parameter -> array (chains, draws).
    """
    names = list(chains)
    with plot_style():
        fig, axs = plt.subplots(len(names), 2, figsize=(7.2, 1.25 * len(names) + 0.6),
                                squeeze=False, layout="constrained",
                                gridspec_kw={"width_ratios": [2.2, 1]})
        for row, name in enumerate(names):
            arr = np.asarray(chains[name], dtype=float)
            n_ch, n_dr = arr.shape
            ranks = arr.ravel().argsort().argsort().reshape(arr.shape)
            bins = np.linspace(0, arr.size, min(20, max(5, n_dr // 10)) + 1)
            for c in range(n_ch):
                colour = _SERIES[c % len(_SERIES)]
                axs[row, 0].plot(arr[c], lw=0.5, color=colour, alpha=0.8)
                axs[row, 1].hist(ranks[c], bins=bins, histtype="step", color=colour, lw=1.0)
            axs[row, 1].axhline(n_dr / (len(bins) - 1), color="#555555", lw=0.7, ls=":")
            axs[row, 0].set_ylabel(parameter_label(name), fontsize=7)
            axs[row, 1].set_yticks([])
            axs[row, 0].grid(False)
            axs[row, 1].grid(False)
        axs[-1, 0].set_xlabel("draw (after tuning), one line per chain")
        axs[-1, 1].set_xlabel("pooled rank, per chain")
        if title:
            fig.suptitle(title, x=0.01, ha="left", fontsize=9)
    return fig


def _prior_pdf(spec: Mapping[str, object], x: np.ndarray) -> np.ndarray | None:
    from scipy import stats

    d = spec.get("dist")
    g = {k: float(v) for k, v in spec.items() if k != "dist" and isinstance(v, int | float)}
    if d == "Uniform":
        return stats.uniform(g["lower"], g["upper"] - g["lower"]).pdf(x)
    if d == "Normal":
        return stats.norm(g["mu"], g["sigma"]).pdf(x)
    if d == "HalfNormal":
        return stats.halfnorm(0.0, g["sigma"]).pdf(x)
    if d == "LogNormal":
        return stats.lognorm(g["sigma"], scale=np.exp(g["mu"])).pdf(x)
    if d == "TruncatedNormal":
        a, b = (g["lower"] - g["mu"]) / g["sigma"], (g["upper"] - g["mu"]) / g["sigma"]
        return stats.truncnorm(a, b, g["mu"], g["sigma"]).pdf(x)
    return None


def prior_posterior_plot(draws: Mapping[str, np.ndarray],
                         priors: Mapping[str, Mapping[str, object]], *,
                         title: str | None = None) -> Figure:
    """Posterior histogram against the prior density, one panel per parameter.

    Parameters
    ----------
    draws : mapping
        Parameter -> 1-d array of posterior draws.
    priors : mapping
        Parameter -> ``{"dist": name, <parameters>}`` (Uniform, Normal, HalfNormal,
        LogNormal, TruncatedNormal), as recorded in ``sample.json``.
    """
    names = [n for n in draws if n in priors]
    ncol = min(3, len(names))
    nrow = int(np.ceil(len(names) / ncol))
    with plot_style():
        fig, axs = plt.subplots(nrow, ncol, figsize=(7.2, 2.0 * nrow + 0.4), squeeze=False,
                                layout="constrained")
        for ax, name in zip(axs.ravel(), names, strict=False):
            v = np.asarray(draws[name], dtype=float)
            v = v[np.isfinite(v)]
            ax.hist(v, bins=30, density=True, color=OKABE_ITO["blue"], alpha=0.7,
                    label="posterior")
            lo, hi = np.percentile(v, [0.5, 99.5])
            span = hi - lo or abs(hi) or 1.0
            x = np.linspace(lo - 0.6 * span, hi + 0.6 * span, 400)
            pdf = _prior_pdf(priors[name], x)
            if pdf is not None:
                ax.plot(x, pdf, color=OKABE_ITO["vermillion"], lw=1.4, label="prior")
            ax.set_title(f"prior {priors[name].get('dist')}", fontsize=8, loc="left")
            ax.set_xlabel(parameter_label(name), fontsize=8)
            ax.set_yticks([])
            ax.grid(False)
        for ax in axs.ravel()[len(names):]:
            ax.set_visible(False)
        axs.ravel()[0].legend(loc="upper right", fontsize=7)
        if title:
            fig.suptitle(title, x=0.01, ha="left", fontsize=9)
    return fig


def save_figure(fig: Figure, stem: str | Path, formats: Sequence[str] = ("png", "svg")
                ) -> list[Path]:
    """Write a figure as ``stem.png`` and ``stem.svg`` (or the given formats)."""
    paths = []
    for fmt in formats:
        path = Path(f"{stem}.{fmt}")
        with plot_style():  # rcParams apply at save time: text stays text in SVG/PDF
            fig.savefig(path, format=fmt, metadata=_metadata(fmt), dpi=300)
        paths.append(path)
    return paths


def _metadata(fmt: str) -> dict[str, str | None]:
    # no timestamps: the same result gives the same file
    if fmt == "svg":
        return {"Date": None}
    if fmt == "png":
        return {"Software": "planetmix (matplotlib)"}
    return {}


def png_bytes(fig: Figure, *, dpi: int = 150) -> bytes:
    """The figure as PNG bytes (150 dpi for reports; :func:`save_figure` writes 300)."""
    buf = io.BytesIO()
    with plot_style():
        fig.savefig(buf, format="png", dpi=dpi, metadata=_metadata("png"))
    return buf.getvalue()


def svg_text(fig: Figure) -> str:
    """The figure as SVG text (fonts as text, no external references)."""
    buf = io.StringIO()
    with plot_style():
        fig.savefig(buf, format="svg", metadata=_metadata("svg"))
    return buf.getvalue()


def isotope_plot(observed: Mapping[str, tuple[float, float]],
                 ranges: Mapping[str, Mapping[str, tuple[float, float]]], *,
                 predicted: Mapping[str, Mapping[str, float]] | None = None,
                 units: Mapping[str, str] | None = None,
                 title: str | None = None) -> Figure:
    """Isotope constraints: observed windows and the intervals the hypotheses reach.

    One panel per isotope system; in each, the observed value with its window (shaded)
    and, one row per hypothesis, the interval its building blocks can reach
    (:func:`inversion.isotopes.reachable_intervals`), with the fitted value as a dot.
    Rows can be any labelled mixtures (e.g. the early and late mixtures of a staged fit).

    Parameters
    ----------
    observed : mapping
        System -> (observed value, window half-width) [permil or epsilon].
    ranges : mapping
        Hypothesis label -> {system -> (lo, hi)}; a system missing for a row is skipped.
    predicted : mapping, optional
        Hypothesis label -> {system -> fitted value}.
    units : mapping, optional
        System -> unit label (default: permil for D17O, epsilon otherwise).
    title : str, optional
    """
    systems = list(observed)
    labels = list(ranges)
    units = dict(units or {})
    with plot_style():
        fig, axes = plt.subplots(1, max(1, len(systems)), sharey=True, squeeze=False,
                                 figsize=(_width(2.6 * max(1, len(systems)) + 1.0),
                                          0.42 * max(1, len(labels)) + 1.5),
                                 layout="constrained")
        y = np.arange(len(labels))[::-1]
        for ax, name in zip(axes[0], systems, strict=False):
            value, half = observed[name]
            ax.axvspan(value - half, value + half, color=OKABE_ITO["sky"], alpha=0.3,
                       lw=0, label="observed window")
            ax.axvline(value, color=OKABE_ITO["blue"], lw=1.0)
            for yi, lab in zip(y, labels, strict=True):
                if name not in ranges[lab]:
                    continue
                lo, hi = ranges[lab][name]
                meets = hi >= value - half and lo <= value + half
                colour = OKABE_ITO["green"] if meets else OKABE_ITO["vermillion"]
                ax.plot([lo, hi], [yi, yi], color=colour, lw=3.5, solid_capstyle="butt")
                if lo == hi:
                    ax.plot([lo], [yi], "|", color=colour, ms=10, mew=2)
                if predicted and name in predicted.get(lab, {}):
                    ax.plot([predicted[lab][name]], [yi], "o", color="black", ms=4)
            unit = units.get(name, "permil" if name == "D17O" else "epsilon")
            ax.set_xlabel(f"{name} [{unit}]")
            ax.set_title(name, loc="left")
        axes[0][0].set_yticks(y, labels)
        for ax in axes[0][len(systems):]:
            ax.set_visible(False)
        handles = [plt.Line2D([], [], color=OKABE_ITO["green"], lw=3.5,
                              label="reachable, meets the window"),
                   plt.Line2D([], [], color=OKABE_ITO["vermillion"], lw=3.5,
                              label="reachable, misses it")]
        if predicted:
            handles.append(plt.Line2D([], [], color="black", marker="o", ls="",
                                      label="fitted"))
        # one legend row only where the panels are wide enough to hold it
        fig.legend(handles=handles, loc="outside lower center",
                   ncols=len(handles) if len(systems) >= 3 else 1)
        if title:
            fig.suptitle(title, x=0.01, ha="left")
    return fig


#: Moderately siderophile elements shown by :func:`siderophile_plot` when fitted.
SIDEROPHILE_PANEL = ("Ni", "Co", "W", "Mo", "V", "Cr", "Mn", "Si", "Ga", "P", "Nb", "Ta",
                     "Cu", "Ge")


def siderophile_plot(residuals: pd.DataFrame, conditions: Mapping[str, object], *,
                     normaliser: str = "CI", reference: str = "Mg",
                     title: str | None = None,
                     pt_draws: np.ndarray | None = None) -> Figure:
    """Core formation at (P, T, dIW): the mantle siderophile pattern and the pressure.

    Left: observed (1-sigma bars) and modelled normalised abundances of the moderately
    siderophile elements of :data:`SIDEROPHILE_PANEL` the fit holds, the elements whose D
    come from a metal/silicate regression drawn filled, those on the effective D open.
    Right (when the pressure was inferred): the chi2 profile over the pressure with the
    delta chi2 = 1 and 3.84 levels and the two intervals shaded, the temperature on the
    top axis when it follows the liquidus.

    Parameters
    ----------
    residuals : DataFrame
        ``residuals.csv`` of a fit (element, observed, model, sigma, fitted).
    conditions : mapping
        ``core_conditions`` of ``fit.json`` (or of ``sample.json``).
    pt_draws : ndarray (S, 2), optional
        Posterior draws of (P [GPa], T [K]): the right panel then shows the inferred
        (P, T) region (the draws and their 90% box) with the peridotite liquidus. With
        ``model_lo``/``model_hi`` columns in ``residuals`` (a sample) the modelled
        abundances carry their posterior 90% band.
    """
    sources = dict(conditions.get("sources") or {})  # type: ignore[arg-type]
    df = residuals[residuals["element"].isin(SIDEROPHILE_PANEL)].copy()
    df["order"] = [SIDEROPHILE_PANEL.index(e) for e in df["element"]]
    df = df.sort_values("order")
    prof = conditions.get("pressure_inferred")
    if pt_draws is not None:
        prof = None  # a sample: the posterior (P, T) region takes the right panel
    with plot_style():
        ncols = 2 if prof or pt_draws is not None else 1
        fig, axes = plt.subplots(1, ncols, figsize=(_width(4.2 * ncols), 3.4), squeeze=False,
                                 layout="constrained")
        ax = axes[0][0]
        x = np.arange(len(df))
        reg = np.array([sources.get(e, "effective") != "effective" for e in df["element"]])
        ax.errorbar(x, df["observed"], yerr=df["sigma"], fmt="none", ecolor="0.4", lw=1)
        ax.plot(x[reg], df["observed"].to_numpy()[reg], "o", color=OKABE_ITO["blue"],
                label="observed (D from a regression)")
        ax.plot(x[~reg], df["observed"].to_numpy()[~reg], "o", mfc="white",
                color=OKABE_ITO["blue"], label="observed (effective D)")
        if {"model_lo", "model_hi"} <= set(df.columns):
            lo_, hi_ = df["model_lo"].to_numpy(float), df["model_hi"].to_numpy(float)
            ax.bar(x, hi_ - lo_, bottom=lo_, width=0.5, color="0.6", alpha=0.5, lw=0,
                   label="model, posterior 90%")
        ax.plot(x, df["model"], "_", color="black", ms=14, mew=2, label="model")
        ax.set_xticks(x, list(df["element"]))
        ax.set_ylabel(f"log$_{{10}}$ (X/{reference})$_{{mantle}}$ / "
                      f"(X/{reference})$_{{{normaliser}}}$")
        P = conditions.get("pressure_GPa")
        T = conditions.get("temperature_K")
        dIW = conditions.get("dIW")
        if isinstance(P, int | float) and isinstance(T, int | float):
            ax.set_title(f"P = {P:.1f} GPa, T = {T:.0f} K, dIW = {float(dIW):.2f}",
                         loc="left")
        ax.legend(loc="best", fontsize="small")
        if prof:
            ax2 = axes[0][1]
            ev = prof["evaluated"]  # type: ignore[index]
            Ps = np.array([e["pressure_GPa"] for e in ev], float)
            c2 = np.array([e["chi2"] for e in ev], float)
            cmin = float(np.nanmin(c2))
            ax2.plot(Ps, c2 - cmin, "o-", color=OKABE_ITO["blue"], ms=3, lw=1)
            for key, dc, shade in (("interval_95", 3.841, 0.15), ("interval_68", 1.0, 0.3)):
                lo, hi = prof[key]  # type: ignore[index]
                ax2.axvspan(lo, hi, color=OKABE_ITO["sky"], alpha=shade, lw=0)
                ax2.axhline(dc, color="0.5", lw=0.8, ls="--")
            # the intervals are the point: the axis stops where chi2 has risen by 25
            ax2.set_ylim(0, max(10.0, 1.1 * float(np.nanmax(np.minimum(c2 - cmin, 25)))))
            ax2.set_xlim(float(Ps.min()), float(Ps.max()))
            ax2.set_xlabel("equilibration pressure [GPa]")
            ax2.set_ylabel(r"$\chi^2 - \chi^2_{min}$")
            ax2.set_title("profile: 68% and 95% intervals", loc="left")
            Ts = np.array([e["temperature_K"] for e in ev], float)
            if np.ptp(Ts) > 0:
                top = ax2.secondary_xaxis("top", functions=(
                    lambda p: np.interp(p, Ps, Ts), lambda t: np.interp(t, Ts, Ps)))
                # one temperature label above each pressure tick (the liquidus is steep
                # at low pressure: the default locator crowds the labels there)
                ticks = [t for t in ax2.get_xticks() if Ps.min() <= t <= Ps.max()]
                temps = np.interp(ticks, Ps, Ts)
                top.set_xticks(temps, [f"{t:.0f}" for t in temps])
                top.set_xlabel("temperature on the liquidus [K]")
        if pt_draws is not None:
            from .partitioning import peridotite_liquidus

            ax2 = axes[0][1]
            pt_ = np.asarray(pt_draws, float)
            ax2.plot(pt_[:, 0], pt_[:, 1], ".", color=OKABE_ITO["blue"], ms=2, alpha=0.4,
                     label="posterior draws")
            (p5, p95), (t5, t95) = (np.percentile(pt_[:, k], [5, 95]) for k in (0, 1))
            ax2.add_patch(plt.Rectangle((p5, t5), p95 - p5, t95 - t5, fill=False,
                                        ec="black", lw=1, label="90% of P and of T"))
            grid = np.linspace(max(0.0, pt_[:, 0].min() * 0.9), pt_[:, 0].max() * 1.1, 50)
            ax2.plot(grid, peridotite_liquidus(grid), "--", color=OKABE_ITO["vermillion"],
                     lw=1, label="peridotite liquidus (Fiquet et al. 2010)")
            ax2.set_xlabel("equilibration pressure [GPa]")
            ax2.set_ylabel("temperature [K]")
            ax2.set_title("inferred (P, T) region", loc="left")
            ax2.legend(loc="best", fontsize="small")
        if title:
            fig.suptitle(title)
    return fig
