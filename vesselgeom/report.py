"""One self-contained HTML report for a subject folder (``analyze``) or a batch folder (``batch``).

The page has no external references: CSS is inline, images are embedded as base64 ``data:`` URIs and
there is no JavaScript, so the single file can be archived or sent as it is. All text taken from the
output files is escaped. Numbers are shown to 4 significant digits; the CSV files keep full precision.

>>> from vesselgeom.report import write_report                      # doctest: +SKIP
>>> write_report("results/subject01")                              # doctest: +SKIP
PosixPath('results/subject01/report.html')
"""

from __future__ import annotations

import base64
import csv
import html
import json
import os
import re
from importlib.resources import files
from pathlib import Path

from . import __version__
from .errors import InputError
from .pipeline import CAUTION

__all__ = ["write_report", "MAX_ROWS"]

MAX_ROWS = 200  # rows shown per table; the CSV beside the report has them all
_FLOAT_DTYPES = ("float64", "float32")
_TEXT_COLUMNS = {"subject", "group", "status", "message"}  # never rounded in tables without a schema
_INTEGER = re.compile(r"[+-]?\d+")
_CSS = """
body { font-family: sans-serif; margin: 1.5em auto; max-width: 1400px; color: #222; padding: 0 1em; }
h2 { border-bottom: 1px solid #bbb; margin-top: 1.8em; }
.caution { border: 2px solid #b00; background: #fff3f3; padding: .6em 1em; font-weight: bold; }
.note { color: #555; font-style: italic; }
table { border-collapse: collapse; font-size: .85em; margin: .5em 0; }
th, td { border: 1px solid #ccc; padding: 2px 6px; text-align: left; vertical-align: top; }
th { background: #eee; } .unit { font-weight: normal; color: #555; } tr.failed td { background: #fcc; }
.scroll { overflow-x: auto; } img { max-width: 100%; } .thumb img { width: 420px; }
figure { display: inline-block; margin: .5em; } figcaption { font-size: .85em; color: #444; }
"""


def write_report(
    folder: str | os.PathLike[str],
    *,
    out: str | os.PathLike[str] | None = None,
    comparison: str | os.PathLike[str] | None = None,
) -> Path:
    """Write one self-contained HTML report for an output folder.

    Parameters
    ----------
    folder : path
        A subject folder written by ``vesselgeom analyze`` or :meth:`vesselgeom.Result.write` (it holds
        ``run.json`` and ``branches.csv``), or a batch folder written by ``vesselgeom batch`` (it holds
        ``status.csv``).
    out : path, optional
        HTML file to write; default ``folder/report.html``.
    comparison : path, optional
        Folder written by ``vesselgeom compare``, included in a batch report; by default a sibling of
        ``folder`` named ``comparison`` is included when it exists.

    Returns
    -------
    Path
        The HTML file written.

    Raises
    ------
    InputError
        When ``folder`` is neither kind of output folder, or one of its files cannot be read.
    """
    folder = Path(folder)
    if (folder / "run.json").is_file() and (folder / "branches.csv").is_file():
        title, body = _subject_page(folder)
    elif (folder / "status.csv").is_file():
        title, body = _batch_page(folder, Path(comparison) if comparison is not None else None)
    else:
        raise InputError(
            f"{folder}: not a vesselgeom output folder; pass a folder written by 'vesselgeom analyze' "
            "(run.json, branches.csv) or 'vesselgeom batch' (status.csv)"
        )
    caution = f'<p class="caution">{_esc(CAUTION)}</p>'
    doc = (
        f'<!DOCTYPE html>\n<html lang="en">\n<head>\n<meta charset="utf-8">\n<title>{_esc(title)}</title>\n'
        f"<style>{_CSS}</style>\n</head>\n<body>\n<h1>{_esc(title)}</h1>\n{caution}\n{body}\n"
        f'<p class="note">Report written by vesselgeom {_esc(__version__)}.</p>\n{caution}\n'
        "</body>\n</html>\n"
    )
    path = Path(out) if out is not None else folder / "report.html"
    part = path.with_name(path.name + ".part")  # never leave a half-written report
    part.write_text(doc, encoding="utf-8")
    part.replace(path)
    return path


def _subject_page(folder: Path) -> tuple[str, str]:
    run = _read_json(folder / "run.json")
    columns = _read_json(folder / "columns.json", optional=True)
    schema = columns.get("tables", {})
    inp = run.get("input", {})
    keys = ("source", "sha256", "shape", "voxel_size_mm", "orientation", "units_in_file", "dtype")
    derived = {f"derived: {k}": v for k, v in run.get("derived", {}).items()}
    software = {k: run.get(k) for k in ("software", "version")} | run.get("environment", {})
    branches = _read_csv(folder / "branches.csv")
    parts = [
        "<h2>Input</h2>",
        _kv_table({k: inp.get(k) for k in keys + ("foreground_voxels",)}),
        "<h2>Settings</h2>",
        _kv_table(run.get("settings", {}) | derived),
        "<h2>Warnings</h2>",
        _list(run.get("warnings", [])),
        "<h2>Counts</h2>",
        _kv_table(run.get("counts", {})),
        "<h2>Quality-control image</h2>",
        _image(folder / "qc.png", "qc.png: maximum-intensity projections of the mask with the centreline"),
        "<h2>branches.csv</h2>",
        _table(branches, "branches.csv", schema.get("branches.csv")),
        "<h2>junctions.csv</h2>",
        _table(_read_csv(folder / "junctions.csv"), "junctions.csv", schema.get("junctions.csv")),
        "<h2>Accuracy</h2>",
        _accuracy(run.get("settings", {}), run.get("derived", {}), branches),
        "<h2>Column glossary</h2>",
        _glossary(schema, columns.get("conventions", {})),
        "<h2>Software</h2>",
        _kv_table(software | {f"{k} (s)": v for k, v in run.get("timings_seconds", {}).items()}),
    ]
    return f"vesselgeom report: {Path(str(inp.get('source', folder))).name}", "\n".join(parts)


def _batch_page(folder: Path, comparison: Path | None) -> tuple[str, str]:
    info = _read_json(folder / "batch.json", optional=True)
    status = _read_csv(folder / "status.csv")
    summary = folder / "cohort_subjects.csv"
    parts = [
        "<h2>Batch</h2>",
        _kv_table({k: info.get(k) for k in ("version", "subjects", "counts", "jobs", "seconds")}),
        "<h2>Status</h2>",
        _table(status, "status.csv", highlight=("status", "failed")),
        "<h2>Per-subject summary</h2>",
        '<p class="note"><code>&lt;index&gt;__lw_mean</code> is the length-weighted mean of that '
        "branches.csv column over the subject's branches, <code>&lt;index&gt;__median</code> its median.</p>",
        _table(_read_csv(summary) if summary.is_file() else [], summary.name),
    ]
    if comparison is None and (folder.parent / "comparison" / "comparison.csv").is_file():
        comparison = folder.parent / "comparison"
    if comparison is not None:
        parts.append(_comparison(comparison, folder))
    notes, images = [], []
    for row in (r for r in status if r.get("status") != "failed"):
        sub = folder / row["subject"]
        run = _read_json(sub / "run.json", optional=True)
        notes += [f"{row['subject']}: {w}" for w in run.get("warnings", [])]
        images.append(_image(sub / "qc.png", f"{row['subject']} ({row.get('group', '')})", thumb=True))
    pooled = folder / "cohort_branches.csv"
    parts += [
        "<h2>Warnings recorded in the subjects' run.json</h2>",
        _list(notes),
        "<h2>Quality-control images</h2>",
        *images,
        "<h2>Accuracy</h2>",
        _accuracy(info.get("settings", {}), {}, _read_csv(pooled) if pooled.is_file() else []),
        "<h2>Settings</h2>",
        _kv_table(info.get("settings", {})),
    ]
    return f"vesselgeom batch report: {folder.resolve().name}", "\n".join(parts)


def _comparison(comp: Path, batch: Path) -> str:
    if not (comp / "comparison.csv").is_file():
        raise InputError(f"{comp}: no comparison.csv; pass a folder written by 'vesselgeom compare'")
    run = _read_json(comp / "run.json", optional=True)
    parts = ["<h2>Group comparison</h2>"]
    if run.get("batch") and Path(run["batch"]).resolve() != batch.resolve():
        parts.append(f'<p class="note">Computed from {_esc(run["batch"])}, not from this folder.</p>')
    parts += [
        f"<p>Groups by column <code>{_esc(run.get('by', '?'))}</code>. Warnings:</p>",
        _list(run.get("warnings", [])),
        _table(_read_csv(comp / "comparison.csv"), "comparison.csv"),
        *(_image(p, p.stem) for p in sorted((comp / "figures").glob("*.png"))),
    ]
    return "\n".join(parts)


def _accuracy(settings: dict, derived: dict, branches: list[dict[str, str]]) -> str:
    """The validation statement shipped with the package, and the branches below the validated radius."""
    try:
        summary = json.loads(files("vesselgeom").joinpath("data/validation_summary.json").read_text())
    except (OSError, ValueError):
        summary = {}
    if summary.get("statement"):
        parts = [f"<p>{_esc(summary['statement'])}</p>"]
        if summary.get("version") != __version__:
            parts.append(f'<p class="note">Validated with vesselgeom {_esc(summary.get("version"))}.</p>')
        rows = [{k: str(v) for k, v in r.items()} for r in summary.get("rows", [])]
        parts.append(_table(rows, "validation summary"))
    else:
        parts = [
            '<p class="note">No validation summary (vesselgeom/data/validation_summary.json) is installed '
            "with this copy of vesselgeom; see docs/validation.md in the source distribution.</p>"
        ]
    flagged = sum("radius_below_validated" in (r.get("flags") or "").split(";") for r in branches)
    mm = derived.get("min_validated_radius_mm")
    parts.append(
        f"<p>Accuracy has been shown for vessel radii of at least "
        f"{_esc(_value(settings.get('min_validated_radius_voxels')))} voxels of the coarsest axis"
        f"{f' ({mm:.4g} mm here)' if mm is not None else ''}. {flagged} of {len(branches)} branches have a "
        "smaller mean radius and carry the flag <code>radius_below_validated</code>.</p>"
    )
    return "\n".join(parts)


def _esc(value: object) -> str:
    return html.escape("" if value is None else str(value), quote=True)


def _read_json(path: Path, *, optional: bool = False) -> dict:
    if optional and not path.is_file():
        return {}
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise InputError(f"{path}: not readable JSON ({type(exc).__name__}); re-run the command") from None


def _read_csv(path: Path) -> list[dict[str, str]]:
    try:
        with open(path, newline="", encoding="utf-8") as f:
            return list(csv.DictReader(f))
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        raise InputError(
            f"{path}: not a readable CSV file ({type(exc).__name__}); re-run the command"
        ) from None


def _value(v: object) -> str:
    """A JSON value as short text: floats to 4 significant digits, None as "none"."""
    if isinstance(v, dict):
        return "; ".join(f"{k}: {_value(x)}" for k, x in v.items())
    if isinstance(v, list):
        return ", ".join(_value(x) for x in v)
    return "none" if v is None else f"{v:.4g}" if isinstance(v, float) else str(v)


def _number(text: str) -> str:
    """CSV text to 4 significant digits when it is a non-integer number; integers and text unchanged."""
    if _INTEGER.fullmatch(text):
        return text  # ids such as "01" keep their leading zeros
    try:
        return f"{float(text):.4g}"
    except ValueError:
        return text


def _table(rows: list[dict[str, str]], name: str, schema=None, *, highlight=None) -> str:
    """CSV rows as a table with id ``name``: at most MAX_ROWS rows, units in the header from ``schema``.

    ``schema`` is the table's list of columns from columns.json (only its float columns are rounded);
    ``highlight`` is a (column, value) pair whose rows are marked with class "failed".
    """
    if not rows:
        return f'<p class="note">{_esc(name)}: no rows.</p>'
    meta = {c["name"]: c for c in schema or []}
    text = (
        {c for c in rows[0] if meta.get(c, {}).get("dtype") not in _FLOAT_DTYPES} if meta else _TEXT_COLUMNS
    )
    units = {c: f' <span class="unit">[{_esc(m["unit"])}]</span>' for c, m in meta.items() if m["unit"]}
    head = "".join(f"<th>{_esc(c)}{units.get(c, '')}</th>" for c in rows[0])
    body = []
    for row in rows[:MAX_ROWS]:
        mark = ' class="failed"' if highlight and row.get(highlight[0]) == highlight[1] else ""
        cells = "".join(f"<td>{_esc(v if c in text else _number(v or ''))}</td>" for c, v in row.items())
        body.append(f"<tr{mark}>{cells}</tr>")
    note = ""
    if len(rows) > MAX_ROWS:
        note = f'<p class="note">Showing the first {MAX_ROWS} of {len(rows)} rows (all in {_esc(name)}).</p>'
    table_id = re.sub(r"[^A-Za-z0-9]+", "-", name)
    rows_html = "\n".join(body)
    return f'{note}<div class="scroll"><table id="{table_id}">\n<tr>{head}</tr>\n{rows_html}\n</table></div>'


def _kv_table(items: dict) -> str:
    rows = "".join(f"<tr><th>{_esc(k)}</th><td>{_esc(_value(v))}</td></tr>" for k, v in items.items())
    return f"<table>{rows}</table>"


def _list(items: list) -> str:
    return "<ul>" + "".join(f"<li>{_esc(i)}</li>" for i in items) + "</ul>" if items else "<p>None.</p>"


def _glossary(schema: dict, conventions: dict) -> str:
    parts = []
    for table, columns in schema.items():
        rows = "".join(
            "<tr>" + "".join(f"<td>{_esc(c[k])}</td>" for k in ("name", "unit", "description")) + "</tr>"
            for c in columns
        )
        head = "<tr><th>name</th><th>unit</th><th>description</th></tr>"
        table_id = "glossary-" + re.sub(r"[^A-Za-z0-9]+", "-", table)
        parts.append(f'<h3>{_esc(table)}</h3><table id="{table_id}">{head}{rows}</table>')
    items = "".join(f"<dt>{_esc(k)}</dt><dd>{_esc(v)}</dd>" for k, v in conventions.items())
    parts.append(f"<h3>Conventions</h3><dl>{items}</dl>" if items else "")
    return "\n".join(parts) or '<p class="note">columns.json is missing.</p>'


def _image(path: Path, caption: str, *, thumb: bool = False) -> str:
    """The PNG at ``path`` embedded as a data URI in a figure (thumbnail width with ``thumb``)."""
    if not path.is_file():
        return (
            f'<p class="note">{_esc(caption)}: {_esc(path.name)} was not written (exports switched off).</p>'
        )
    uri = "data:image/png;base64," + base64.b64encode(path.read_bytes()).decode("ascii")
    cap, cls = _esc(caption), ' class="thumb"' if thumb else ""
    return f'<figure{cls}><img src="{uri}" alt="{cap}"><figcaption>{cap}</figcaption></figure>'
