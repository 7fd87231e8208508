"""The ``report`` and ``template`` commands.

``planetmix report DIR`` turns a result folder into ``DIR/report.html``;
``planetmix template KIND`` writes a blank, commented input template.
"""

from __future__ import annotations

import argparse
import shutil
from importlib import resources
from pathlib import Path

from .cli import EXIT_OK, register
from .exceptions import InputError
from .options import check_option

__all__ = ["TEMPLATES", "template_text", "write_template"]

#: Template kind -> file name (the same name in ``data_templates/`` and the package).
TEMPLATES: dict[str, str] = {
    "case": "case.toml",
    "target": "target.csv",
    "component": "component.csv",
    "star": "star_abundances.csv",
    "catalog": "catalog.csv",
}


def template_text(kind: str) -> str:
    """The text of a template shipped with the package."""
    check_option("template", kind, TEMPLATES, field="KIND")
    res = resources.files("inversion").joinpath("templates", TEMPLATES[kind])
    if not res.is_file():
        raise InputError("this template is not installed with the package", field="KIND",
                         value=kind)
    return res.read_text(encoding="utf-8")


def write_template(kind: str, folder: str | Path = ".", *, force: bool = False) -> Path:
    """Write the template of ``kind`` into ``folder`` (never over an existing file
    unless ``force``)."""
    text = template_text(kind)
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / TEMPLATES[kind]
    if path.exists() and not force:
        raise InputError("file exists; remove it, choose another --dir, or pass --force",
                         file=str(path))
    tmp = path.with_name(f".{path.name}.tmp")
    tmp.write_text(text, encoding="utf-8")
    shutil.move(tmp, path)
    return path


@register("report", "turn a result folder (fit, rank, sample, compare, star, batch, "
          "sensitivity) into one HTML file")
def _report(parser: argparse.ArgumentParser):
    parser.add_argument("folder", help="a result folder written by planetmix")
    parser.add_argument("--out", default=None, help="HTML file (default FOLDER/report.html)")
    parser.add_argument("--figures", action="store_true",
                        help="also write each figure as PNG and SVG into FOLDER/figures/")

    def run(args: argparse.Namespace) -> int:
        from .report import build_report, detect_kind

        kind = detect_kind(args.folder)
        path = build_report(args.folder, out=args.out, figures=args.figures)
        print(f"{kind} report written to {path}")
        if args.figures:
            print(f"figures (PNG, SVG) in {Path(args.folder) / 'figures'}")
        return EXIT_OK

    return run


@register("template", "write a blank, commented input template (case, target, component, "
          "star, catalog)")
def _template(parser: argparse.ArgumentParser):
    parser.add_argument("kind", help="one of: " + ", ".join(TEMPLATES))
    parser.add_argument("--dir", default=".", help="folder to write into (default: here)")
    parser.add_argument("--force", action="store_true", help="overwrite an existing file")

    def run(args: argparse.Namespace) -> int:
        path = write_template(args.kind, args.dir, force=args.force)
        print(f"wrote {path}; fill it in (the example values already pass validation)")
        return EXIT_OK

    return run
