"""The HTML report: self-contained, escaped, complete for subject and batch folders."""

from __future__ import annotations

import base64
import json
import shutil
from html.parser import HTMLParser
from importlib.resources import files

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

import vesselgeom
from vesselgeom import CAUTION
from vesselgeom.cli import main
from vesselgeom.cohort import compare, read_manifest, run_batch
from vesselgeom.errors import InputError
from vesselgeom.phantoms import tree_phantom
from vesselgeom.report import MAX_ROWS, write_report
from vesselgeom.tables import BRANCH_COLUMNS

# HTML 5 void elements (WHATWG HTML Living Standard, section 13.1.2): they have no end tag
_VOID = {"area", "base", "br", "col", "embed", "hr", "img", "input", "link", "meta", "source", "track", "wbr"}
# PNG file signature (PNG specification, ISO/IEC 15948, section 5.2)
_PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


class _Page(HTMLParser):
    """Collects tags with attributes, text, table cells by table id, and end tags that do not match."""

    def __init__(self, text: str):
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, dict]] = []
        self.text: list[str] = []
        self.tables: dict[str, list[list[str]]] = {}
        self.row_classes: dict[str, list[str | None]] = {}
        self.mismatched: list[str] = []
        self._open: list[str] = []
        self._table: str | None = None
        self._cell: list[str] | None = None
        self.feed(text)
        self.close()

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        self.tags.append((tag, attrs))
        if tag not in _VOID:
            self._open.append(tag)
        if tag == "table":
            self._table = attrs.get("id") or f"#{len(self.tables)}"
            self.tables[self._table], self.row_classes[self._table] = [], []
        elif tag == "tr" and self._table:
            self.tables[self._table].append([])
            self.row_classes[self._table].append(attrs.get("class"))
        elif tag in ("td", "th"):
            self._cell = []

    def handle_endtag(self, tag):
        if self._open and self._open[-1] == tag:
            self._open.pop()
        else:
            self.mismatched.append(tag)
        if tag in ("td", "th") and self._cell is not None:
            self.tables[self._table][-1].append("".join(self._cell))
            self._cell = None
        elif tag == "table":
            self._table = None

    def handle_data(self, data):
        self.text.append(data)
        if self._cell is not None:
            self._cell.append(data)

    @property
    def all_text(self) -> str:
        return "".join(self.text)

    def column(self, table: str, index: int = 0) -> list[str]:
        return [row[index] for row in self.tables[table][1:]]


def _check_self_contained(page: _Page, raw: str) -> None:
    """No element may load anything from elsewhere; every image is an embedded PNG."""
    assert page.mismatched == [] and page._open == []  # well nested, everything closed
    tags = {t for t, _ in page.tags}
    assert not tags & {"script", "link", "iframe", "object", "embed", "base"}
    for _, attrs in page.tags:
        for name, value in attrs.items():
            if name in ("src", "href", "srcset", "action"):
                assert not (value or "").startswith(("http://", "https://", "//")), value
    assert "url(" not in raw and "@import" not in raw  # no CSS that fetches anything
    images = [a["src"] for t, a in page.tags if t == "img"]
    assert images
    for src in images:
        assert src.startswith("data:image/png;base64,")
        assert base64.b64decode(src.split(",", 1)[1], validate=True).startswith(_PNG_SIGNATURE)
    assert page.all_text.count(CAUTION) >= 2  # at the top and at the bottom


def _statement() -> str:
    path = files("vesselgeom").joinpath("data/validation_summary.json")
    return json.loads(path.read_text())["statement"] if path.is_file() else "docs/validation.md"


@pytest.fixture(scope="module")
def subject(tmp_path_factory):
    ph = tree_phantom(3, spacing=(0.6, 0.6, 0.6))
    return vesselgeom.analyze(ph.mask, affine=ph.affine).write(tmp_path_factory.mktemp("s") / "subject")


def _save(mask: np.ndarray, affine: np.ndarray, path) -> None:
    img = nib.Nifti1Image(mask.astype(np.uint8), affine)
    img.header.set_xyzt_units("mm")
    nib.save(img, path)


@pytest.fixture(scope="module")
def batch(tmp_path_factory):
    root = tmp_path_factory.mktemp("b")
    rows = []
    for k, group in enumerate(("a", "a", "b", "b")):
        ph = tree_phantom(2, root_radius_mm=1.5, root_length_mm=12.0, spacing=(0.5, 0.5, 0.5), seed=k)
        _save(ph.mask, ph.affine, root / f"m{k}.nii.gz")
        rows.append({"subject": f"0{k}", "group": group, "mask": f"m{k}.nii.gz"})
    (root / "broken.nii.gz").write_bytes(b"\x1f\x8b this is not a gzip stream")
    rows.append({"subject": "bad", "group": "a", "mask": "broken.nii.gz"})
    pd.DataFrame(rows).to_csv(root / "manifest.csv", index=False)
    status = run_batch(read_manifest(root / "manifest.csv"), root / "batch", jobs=1, progress=False)
    compare(root / "batch", out_dir=root / "comparison")
    return root / "batch", status


def test_subject_report_is_self_contained_and_complete(subject):
    path = write_report(subject)
    assert path == subject / "report.html"
    raw = path.read_text(encoding="utf-8")
    page = _Page(raw)
    _check_self_contained(page, raw)
    text = page.all_text
    run = json.loads((subject / "run.json").read_text())
    assert run["input"]["sha256"] in text
    assert _statement() in text

    branches = pd.read_csv(subject / "branches.csv")
    table = page.tables["branches-csv"]
    assert sorted(page.column("branches-csv"), key=int) == [str(i) for i in branches.branch_id]
    header = table[0]
    assert header[header.index("length_mm [mm]") + 1] == "chord_mm [mm]"  # unit from columns.json
    # numbers to 4 significant digits, as Python's format specification "g" with precision 4 writes them
    col = header.index("length_mm [mm]")
    assert [row[col] for row in table[1:]] == [format(v, ".4g") for v in branches.length_mm]
    assert len(page.tables["junctions-csv"]) == len(pd.read_csv(subject / "junctions.csv")) + 1
    # the glossary lists every branches.csv column with its unit from the schema
    glossary = page.tables["glossary-branches-csv"][1:]
    assert [(r[0], r[1]) for r in glossary] == [(c.name, c.unit) for c in BRANCH_COLUMNS]


def test_long_tables_are_cut_with_a_note(subject, tmp_path):
    folder = shutil.copytree(subject, tmp_path / "copy")
    one = pd.read_csv(folder / "branches.csv", dtype=str, keep_default_na=False)
    many = pd.concat([one] * (MAX_ROWS // len(one) + 2), ignore_index=True)
    many["branch_id"] = [str(i + 1) for i in range(len(many))]
    many.to_csv(folder / "branches.csv", index=False)
    path = write_report(folder, out=tmp_path / "r.html")
    page = _Page(path.read_text(encoding="utf-8"))
    assert page.column("branches-csv") == [str(i + 1) for i in range(MAX_ROWS)]
    assert f"first {MAX_ROWS} of {len(many)} rows" in page.all_text


def test_text_from_the_folder_is_escaped(subject, tmp_path):
    folder = shutil.copytree(subject, tmp_path / "copy")
    run = json.loads((folder / "run.json").read_text())
    run["warnings"] = ['<script>alert("x")</script> & <img src="https://example.org/a.png">']
    (folder / "run.json").write_text(json.dumps(run))
    raw = write_report(folder).read_text(encoding="utf-8")
    page = _Page(raw)
    _check_self_contained(page, raw)  # the injected tags stayed text
    assert run["warnings"][0] in page.all_text


def test_batch_report_names_subjects_failures_and_comparison(batch):
    folder, status = batch
    assert (status["status"] == "failed").sum() == 1  # the corrupt file
    raw = write_report(folder).read_text(encoding="utf-8")
    page = _Page(raw)
    _check_self_contained(page, raw)
    text = page.all_text

    assert page.column("status-csv") == list(status["subject"])
    failed = status.index[status["status"] == "failed"][0]
    assert page.row_classes["status-csv"][1 + failed] == "failed"
    assert page.row_classes["status-csv"].count("failed") == 1
    assert status.loc[failed, "message"] and status.loc[failed, "message"] in text
    ok = [s for s, st in zip(status["subject"], status["status"], strict=True) if st == "ok"]
    assert page.column("cohort-subjects-csv") == ok

    comparison = pd.read_csv(folder.parent / "comparison" / "comparison.csv")
    assert page.column("comparison-csv") == list(comparison["metric"])
    figures = sorted((folder.parent / "comparison" / "figures").glob("*.png"))
    captions = [a.get("alt") for t, a in page.tags if t == "img"]
    groups = status.set_index("subject")["group"]
    assert captions == [p.stem for p in figures] + [f"{s} ({groups[s]})" for s in ok]
    assert _statement() in text


def test_non_output_folders_are_rejected(tmp_path):
    (tmp_path / "notes.txt").write_text("not an output folder")
    for folder in (tmp_path, tmp_path / "missing"):
        with pytest.raises(InputError) as err:
            write_report(folder)
        assert str(folder) in str(err.value) and "\n" not in str(err.value)
    assert main(["report", str(tmp_path)]) == 2  # the command line's exit status for bad input
    assert not (tmp_path / "report.html").exists()


def test_a_comparison_folder_must_hold_comparison_csv(batch, tmp_path):
    with pytest.raises(InputError, match="comparison.csv"):
        write_report(batch[0], out=tmp_path / "r.html", comparison=tmp_path)
