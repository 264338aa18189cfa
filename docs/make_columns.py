"""Render the column tables of docs/user_guide.md from the schemas in vesselgeom.tables.

Each table goes between the markers ``<!-- columns: NAME -->`` and ``<!-- /columns: NAME -->`` (NAME is
branches.csv, points.csv or junctions.csv); everything between them is replaced, nothing else changes.
Run after any change to a column: ``python docs/make_columns.py``.
"""

from __future__ import annotations

import re
import sys
from pathlib import Path

from vesselgeom.tables import TABLE_SCHEMAS, Column

GUIDE = Path(__file__).resolve().parent / "user_guide.md"


def _cell(text: str) -> str:
    return text.replace("|", "\\|").replace("\n", " ")


def render(columns: tuple[Column, ...]) -> str:
    """A Markdown table: column name, unit ("-" for identifiers and text), type, meaning."""
    lines = ["| column | unit | type | meaning |", "|---|---|---|---|"]
    for c in columns:
        unit = f"`{c.unit}`" if c.unit else "-"
        lines.append(f"| `{c.name}` | {unit} | {c.dtype} | {_cell(c.description)} |")
    return "\n".join(lines)


def main(path: Path = GUIDE) -> int:
    text = path.read_text(encoding="utf-8")
    for name, columns in TABLE_SCHEMAS.items():
        start, end = f"<!-- columns: {name} -->", f"<!-- /columns: {name} -->"
        pattern = re.compile(re.escape(start) + ".*?" + re.escape(end), re.S)
        if not pattern.search(text):
            print(f"{path}: markers for {name} not found ({start} ... {end})", file=sys.stderr)
            return 1
        text = pattern.sub(lambda _m, c=columns, s=start, e=end: f"{s}\n{render(c)}\n{e}", text)
    path.write_text(text, encoding="utf-8")
    print(f"{path}: column tables updated")
    return 0


if __name__ == "__main__":
    sys.exit(main())
