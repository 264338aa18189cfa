"""``vesselgeom accuracy`` agrees with docs/validation.md where their grids overlap."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from vesselgeom.cli import main
from vesselgeom.validation import accuracy, summarise

ROOT = Path(__file__).resolve().parents[1]


def _docs_rows(radius: str, anisotropy: str) -> dict[str, list[str]]:
    lines = (ROOT / "docs" / "validation.md").read_text().splitlines()
    header = next(line for line in lines if line.startswith("| phantom |"))
    cols = [c.strip() for c in header.strip("|").split("|")]
    rows = {}
    for line in lines:
        cells = [c.strip() for c in line.strip("|").split("|")]
        if len(cells) == len(cols) and cells[1] == radius and cells[2] == anisotropy:
            rows[cells[0]] = dict(zip(cols, cells, strict=True))
    return rows


def test_accuracy_matches_validation_doc():
    # The same cases (curves, seeds, flips, permutations) at 1 mm voxels and a 2 mm radius are part of
    # the validation grid, so every formatted number must be identical to the committed document.
    table = summarise(accuracy((1.0, 1.0, 1.0), 2.0))
    docs = _docs_rows("2", "1:1")
    assert set(table["phantom"]) == set(docs)
    for row in table.to_dict(orient="records"):
        for col, value in row.items():
            assert str(value) == docs[row["phantom"]][col], (row["phantom"], col)


def test_summary_json_matches_doc():
    doc = json.loads((ROOT / "vesselgeom" / "data" / "validation_summary.json").read_text())
    docs = _docs_rows("2", "1:1")
    rows = {r["phantom"]: r for r in doc["rows"] if r["radius (voxels)"] == "2" and r["anisotropy"] == "1:1"}
    assert rows.keys() == docs.keys()
    assert all(str(rows[p]["torsion % max (median)"]) == docs[p]["torsion % max (median)"] for p in rows)
    assert "phantoms" in doc["statement"]


def test_accuracy_command_prints_table_and_caution(capsys):
    assert main(["accuracy", "--spacing", "1", "1", "1", "--radius", "1.5"]) == 0
    out = capsys.readouterr().out
    assert "helix_right" in out and "Research use only" in out
    assert "below 2 voxels" in out


@pytest.mark.parametrize("bad", [["0", "1", "1"], ["1", "-1", "1"]])
def test_accuracy_rejects_bad_spacing(bad, capsys):
    assert main(["accuracy", "--spacing", *bad, "--radius", "1"]) == 2
    assert "positive" in capsys.readouterr().err
