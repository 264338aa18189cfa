"""Output tables: column schemas, units, typed construction and deterministic CSV.

This layer knows pandas, the column names, their dtypes, units and meaning, and nothing about how
the numbers were computed. Three tables are written per mask:

- ``branches.csv``: one row per branch of the centreline graph (``BRANCH_COLUMNS``),
- ``points.csv``: one row per resampled centreline point (``POINT_COLUMNS``),
- ``junctions.csv``: one row per junction node (``JUNCTION_COLUMNS``).

Conventions shared by all tables (also written into ``columns.json`` by :func:`columns_document`):

- Units are SI-style strings: ``"mm"``, ``"1/mm"``, ``"rad"``, ``"rad/mm"``, ``"deg"``; ``"1"``
  marks a dimensionless number (ratio, count, unit-vector component, fraction); ``""`` marks
  identifiers and text labels, which have no unit.
- An empty field in a numeric column means "not defined" (or not measurable; ``flags`` says why);
  it is never written as 0 or infinity. Text columns are never missing: the empty field there is
  the empty string, so ``flags`` with no reasons reads back as ``""``, and ids such as ``"01"``
  stay text.
- CSV text is deterministic: schema column order, floats with 9 significant digits, ``"\\n"`` line
  endings, UTF-8, no index. The same table always gives the same bytes.
"""

from __future__ import annotations

import csv
import os
import secrets
from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from pandas.api.types import infer_dtype, is_list_like

from vesselgeom.errors import InputError

__all__ = [
    "Column",
    "BRANCH_COLUMNS",
    "POINT_COLUMNS",
    "JUNCTION_COLUMNS",
    "TABLE_SCHEMAS",
    "make_table",
    "write_csv",
    "read_csv",
    "columns_document",
]

_DTYPES = ("int64", "Int64", "float64", "string", "bool")
_FLOAT_FORMAT = "%.9g"
_ARRAY = "<array>"
# rows validated, cast and written at a time by write_csv, so memory stays bounded for large tables
_CSV_BLOCK_ROWS = 65536


@dataclass(frozen=True)
class Column:
    """One column of an output table.

    Parameters
    ----------
    name : str
        Column header in the CSV file.
    dtype : {"int64", "Int64", "float64", "string", "bool"}
        pandas dtype of the column. ``"Int64"`` is pandas' nullable integer (empty field = missing),
        ``"string"`` is pandas ``StringDtype``.
    unit : str
        Unit of the values (``"mm"``, ``"1/mm"``, ``"rad"``, ``"rad/mm"``, ``"deg"``), ``"1"`` for
        dimensionless numbers, ``""`` for identifiers and text labels.
    description : str
        What the value is, how it is obtained, its unit and when the field is empty.
    """

    name: str
    dtype: str
    unit: str
    description: str

    def __post_init__(self) -> None:
        if not self.name or not self.name.isidentifier():
            raise InputError(f"{_ARRAY}: column name {self.name!r} is not an identifier; rename it")
        if self.dtype not in _DTYPES:
            raise InputError(f"{_ARRAY}: column {self.name!r} has dtype {self.dtype!r}; use one of {_DTYPES}")
        if not self.description.strip():
            raise InputError(f"{_ARRAY}: column {self.name!r} has no description; write one")


_NOT_FITTED = "Empty when no centreline could be fitted to the branch (flags says why)."
_BULLITT = "Bullitt, Gerig, Pizer, Lin, Aylward 2003, IEEE TMI 22(9):1163-1171"


def _xyz(prefix: str, what: str, empty: str) -> tuple[Column, ...]:
    return tuple(
        Column(
            f"{prefix}{axis}_mm",
            "float64",
            "mm",
            f"World {axis} coordinate of {what}, in mm, obtained through the image's "
            f"voxel-to-world affine. {empty}",
        )
        for axis in "xyz"
    )


# fmt: off
BRANCH_COLUMNS: tuple[Column, ...] = (
    Column("branch_id", "int64", "",
           "Identifier of the branch, unique within one output folder; it keys the branch's rows"
           " in points.csv and appears in junctions.csv branch_ids. No unit. Never empty."),
    Column("component_id", "int64", "",
           "Identifier of the connected part of the vessel mask that contains the branch, shared"
           " with junctions.csv. No unit. Never empty."),
    Column("kind", "string", "",
           "Place of the branch in the centreline graph: 'terminal' (one free end, one "
           "junction), 'internal' (junctions at both ends), 'loop' (closes on itself, through "
           "one junction or as a ring with no node) or 'isolated' (free ends at both ends, so "
           "the branch is a whole component). No unit. Never empty."),
    Column("start_node", "Int64", "",
           "Identifier of the node where the branch starts (arc_mm = 0 in points.csv); for a "
           "junction it is the node_id in junctions.csv, free ends have ids of their own. No "
           "unit. Empty for a loop that is a ring with no node."),
    Column("end_node", "Int64", "",
           "Identifier of the node where the branch ends (largest arc_mm in points.csv); equal "
           "to start_node for a loop through a junction. No unit. Empty for a loop that is a "
           "ring with no node."),
    Column("length_mm", "float64", "mm",
           "Arc length of the branch's smoothed centreline from its start point to its end "
           "point, the integral of |dr/ds| in world coordinates (never a voxel count). In mm. "
           f"{_NOT_FITTED}"),
    Column("chord_mm", "float64", "mm",
           "Straight-line (Euclidean) distance between the start and end points of the "
           "centreline. In mm. Empty for loops, whose ends coincide so that a chord is not "
           f"meaningful. {_NOT_FITTED}"),
    Column("distance_metric", "float64", "1",
           f"Distance metric DM = length_mm / chord_mm ({_BULLITT}); 1 for a straight branch, "
           "larger the more the branch wanders. Dimensionless. Empty for loops and whenever "
           "chord_mm is empty or zero (never infinite)."),
    Column("inflection_count", "int64", "1",
           "Number of inflection points along the branch: places where the principal normal N "
           "reverses, counted where curvature dips between two well-curved stretches whose "
           "normals point in opposite directions, ignoring the stretches next to the branch ends"
           " (a helix has none). Dimensionless count. Never empty: a branch without a fitted "
           "centreline gets 0 and a flag."),
    Column("inflection_count_metric", "float64", "1",
           f"Inflection count metric ICM = (inflection_count + 1) x distance_metric ({_BULLITT});"
           " the '+1', which makes ICM equal DM for a branch without inflections, is recalled "
           "from memory of that paper and not verified against its text. Dimensionless. Empty "
           "when distance_metric is empty."),
    Column("sum_of_angles_per_mm", "float64", "rad/mm",
           f"Sum of angles metric SOAM ({_BULLITT}): on the centreline resampled every step_mm, "
           "the sum over interior samples of sqrt(IP^2 + TP^2), with IP the in-plane angle "
           "between consecutive chords and TP the torsional angle between consecutive chord-pair"
           " normals (TP = 0 where such a normal vanishes), divided by length_mm; it tends to "
           "the arc-length mean of sqrt(curvature^2 + torsion^2) as step_mm shrinks. In rad/mm. "
           "Empty when the branch has fewer than four resampled points."),
    Column("mean_curvature_per_mm", "float64", "1/mm",
           "Arc-length mean of the curvature k = |dT/ds| of the smoothed centreline over the "
           "points marked in_summary in points.csv (ends trimmed by about a radius), equal to "
           "total_curvature_rad divided by the arc length of that stretch; 1/k is the radius of "
           f"the osculating circle. In 1/mm. {_NOT_FITTED}"),
    Column("max_curvature_per_mm", "float64", "1/mm",
           "Largest curvature over the branch's points marked in_summary (the maximum of "
           f"curvature_per_mm there). In 1/mm. {_NOT_FITTED}"),
    Column("total_curvature_rad", "float64", "rad",
           "Total curvature, the integral of curvature over arc length (Hart et al. 1999, Int J "
           "Med Inform 53:239-252), over the stretch marked in_summary (the whole ring for a "
           "loop): the total angle the tangent turns through there, 2 pi for a full circle. In "
           f"rad. {_NOT_FITTED}"),
    Column("mean_torsion_per_mm", "float64", "1/mm",
           "Signed torsion summary (dB/ds = -tau N, positive for a right-handed helix): despite "
           "the name, the median of torsion_per_mm over the in_summary points where torsion is "
           "defined, "
           "used as the robust summary because torsion estimates have heavy tails where "
           "curvature is small. In 1/mm. Empty when torsion is defined at no point of the "
           "branch."),
    Column("mean_abs_torsion_per_mm", "float64", "1/mm",
           "Arc-length mean of |torsion| over the in_summary stretch where torsion is defined, i.e. "
           "total_abs_torsion_rad divided by the arc length of that stretch. In 1/mm. Empty when"
           " torsion is defined at no point of the branch."),
    Column("total_abs_torsion_rad", "float64", "rad",
           "Integral of |torsion| over arc length on the in_summary stretch where torsion is defined: the "
           "total angle the binormal B turns through there. In rad. Empty when torsion is "
           "defined at no point of the branch."),
    Column("torsion_defined_fraction", "float64", "1",
           "Fraction (0 to 1) of the branch's in_summary points, which are equally spaced in arc "
           "length, where curvature is above the curvature noise floor recorded in run.json, so "
           f"that torsion is reported there. Dimensionless. {_NOT_FITTED}"),
    Column("mean_radius_mm", "float64", "mm",
           "Mean of radius_mm over the branch's in_summary points in points.csv (distance from "
           "the centreline to the nearest voxel outside the mask). In mm. Empty when the radius "
           "could be measured at no point."),
    Column("min_radius_mm", "float64", "mm",
           "Smallest radius_mm over the branch's in_summary points. In mm. Empty when the "
           "radius could be measured at no point."),
    Column("max_radius_mm", "float64", "mm",
           "Largest radius_mm over the branch's in_summary points. In mm. Empty when the "
           "radius could be measured at no point."),
    *_xyz("start_",
          "the first centreline point (at start_node; for a loop, where the ring is opened)",
          _NOT_FITTED),
    *_xyz("end_",
          "the last centreline point (at end_node; equal to the start point for a loop)",
          _NOT_FITTED),
    Column("step_mm", "float64", "mm",
           "Arc-length step at which the branch's centreline was resampled: consecutive "
           "points.csv rows of the branch are this far apart, and sum_of_angles_per_mm is "
           f"computed on these points. In mm. {_NOT_FITTED}"),
    Column("n_points", "int64", "1",
           "Number of resampled centreline points of the branch, equal to its number of rows in "
           "points.csv. Dimensionless count. Never empty; 0 when no centreline could be fitted."),
    Column("flags", "string", "",
           "Reasons why this row may be unreliable, as short tokens separated by semicolons "
           "without spaces; the empty string when there are none. No unit. Never missing: an "
           "empty field means no flags."),
)

POINT_COLUMNS: tuple[Column, ...] = (
    Column("branch_id", "int64", "",
           "Identifier of the branch (branches.csv branch_id) this point belongs to. No unit. "
           "Never empty."),
    Column("arc_mm", "float64", "mm",
           "Arc length along the smoothed centreline from the branch's start point: 0 at "
           "start_node, length_mm at the end, rows of a branch step_mm apart. In mm. Never "
           "empty."),
    *_xyz("", "the centreline point", "Never empty."),
    Column("curvature_per_mm", "float64", "1/mm",
           "Curvature k = |dT/ds| = |r' x r''| / |r'|^3 of the smoothed centreline at this "
           "point, never negative; 1/k is the radius of the osculating circle. In 1/mm. Never "
           "empty."),
    Column("torsion_per_mm", "float64", "1/mm",
           "Torsion tau defined by dB/ds = -tau N, equal to ((r' x r'') . r''') / |r' x r''|^2; "
           "positive where the curve twists like a right-handed helix and unchanged by reversing"
           " the direction of travel. In 1/mm. Empty where curvature is below the curvature "
           "noise floor recorded in run.json, because torsion is undefined where curvature "
           "vanishes and unstable near it."),
    Column("radius_mm", "float64", "mm",
           "Local vessel radius: distance from the centreline point to the nearest voxel outside"
           " the mask, in world coordinates. In mm. Empty where it could not be measured."),
    *(
        Column(f"tangent_{axis}", "float64", "1",
               f"World {axis} component of the unit tangent T = dr/ds, pointing from the branch's "
               "start towards its end. Dimensionless. Never empty.")
        for axis in "xyz"
    ),
    Column("in_summary", "bool", "",
           "True where the point enters the branch summaries in branches.csv (curvature, torsion "
           "and radius statistics); False within one smoothing scale (about a radius) of either "
           "end and on the straight stub that extends a terminal end. Never empty."),
)

JUNCTION_COLUMNS: tuple[Column, ...] = (
    Column("node_id", "int64", "",
           "Identifier of the junction node, as used in branches.csv start_node and end_node. No"
           " unit. Never empty."),
    Column("component_id", "int64", "",
           "Identifier of the connected part of the vessel mask that contains the junction, "
           "shared with branches.csv. No unit. Never empty."),
    *_xyz("",
          "the junction node, the centroid of its merged cluster of skeleton junction voxels",
          "Never empty."),
    Column("degree", "int64", "1",
           "Number of branch ends meeting at the node: three or more for a junction, and a loop "
           "that leaves and returns here counts twice. Dimensionless count. Never empty."),
    Column("branch_ids", "string", "",
           "branch_id of every branch meeting at the node, each once, in ascending order, "
           "separated by semicolons without spaces (for example '3;7;12'). No unit. Never empty."),
    Column("radius_mm", "float64", "mm",
           "Vessel radius at the node: distance from the node to the nearest voxel outside the "
           "mask, in world coordinates. In mm. Empty where it could not be measured."),
    Column("min_angle_deg", "float64", "deg",
           "Smallest of the pairwise angles listed in angles_deg. In degrees. Empty when no "
           "angle could be measured at the node."),
    Column("max_angle_deg", "float64", "deg",
           "Largest of the pairwise angles listed in angles_deg. In degrees. Empty when no angle"
           " could be measured at the node."),
    Column("angles_deg", "string", "deg",
           "Angle between the outgoing directions of each pair of branch ends at the node, "
           "written 'a-b:angle' and joined by semicolons (for example "
           "'3-7:74.9;3-12:142.0;7-12:143.1'): a <= b are branch_ids, pairs in ascending (a, b) "
           "order, the angle arccos(da . db) in degrees with one decimal, each direction the "
           "branch's unit tangent pointing away from the node, taken junction_angle_radii "
           "smoothing scales (about two radii) along the branch, at most half its length, so "
           "that 180.0 is a straight continuation; a loop "
           "with both ends here gives 'a-a' and may repeat pairs. In degrees. The empty string "
           "when no direction could be measured."),
)
# fmt: on

TABLE_SCHEMAS: dict[str, tuple[Column, ...]] = {
    "branches.csv": BRANCH_COLUMNS,
    "points.csv": POINT_COLUMNS,
    "junctions.csv": JUNCTION_COLUMNS,
}

_CONVENTIONS: dict[str, str] = {
    "coordinates": (
        "Columns named x_mm, y_mm, z_mm (and start_/end_ variants) are world coordinates in "
        "millimetres, obtained by applying the image's full voxel-to-world affine (rotation, "
        "flips, voxel size) to voxel indices, never index x spacing; for NIfTI input the world "
        "frame is the file's RAS+ space."
    ),
    "frame": (
        "Frenet-Serret frame of the centreline r(s) with arc length s: tangent T = dr/ds, "
        "curvature k = |dT/ds|, principal normal N = (dT/ds)/k, binormal B = T x N, torsion tau "
        "defined by dB/ds = -tau N. With this sign a right-handed helix has positive torsion and "
        "a left-handed one negative. Curvature and torsion do not change when the direction of "
        "travel is reversed; torsion is undefined (empty) where curvature is below the noise "
        "floor recorded in run.json."
    ),
    "units": (
        "Lengths and positions in mm; curvature and torsion per mm (unit '1/mm'); sum of angles "
        "in rad/mm; integrated curvature and torsion in rad; angles in degrees ('deg'). Unit '1' "
        "marks a dimensionless number (ratio, count, unit-vector component, fraction); an empty "
        "unit marks identifiers and text labels."
    ),
    "angles": (
        "Angles are in degrees, between 0 and 180, measured between outgoing unit directions; 180"
        " is a straight continuation."
    ),
    "direction": (
        "Each branch runs from start_node to end_node: arc_mm grows and the tangent points in that direction."
    ),
    "missing": (
        "An empty field in a numeric column means the value is not defined for that row (for "
        "example the chord of a closed loop) or could not be measured (the branch's flags say "
        "why); it is never written as 0 or infinity. Text columns are never missing: an empty "
        "text field is the empty string, e.g. flags with no reasons."
    ),
    "lists": (
        "Lists inside one field (flags, branch_ids, angles_deg) are separated by semicolons without spaces."
    ),
    "file_format": (
        "CSV with a header row of the column names, comma separators, RFC 4180 quoting, UTF-8, "
        "'\\n' line endings, no index column, floating-point numbers with 9 significant digits; "
        "the same table always gives the same bytes."
    ),
}


def make_table(
    schema: tuple[Column, ...],
    data: Mapping[str, Any] | pd.DataFrame | None = None,
    *,
    copy: bool = True,
) -> pd.DataFrame:
    """Build a typed table with exactly the columns of ``schema``, in order.

    Parameters
    ----------
    schema : tuple of Column
        Ordered column schema, e.g. ``BRANCH_COLUMNS``.
    data : mapping of str to (n,) array-like, or DataFrame, optional
        One 1-D sequence per column, all of the same length ``n``. Values are taken in positional
        order (a pandas index is ignored). ``None`` or an empty mapping gives a zero-row table.
        Float columns accept ``None``/NaN/``pd.NA`` as missing, and so do ``"Int64"`` columns;
        ``"int64"``, ``"bool"`` and ``"string"`` columns do not (use ``""`` for an empty text).
    copy : bool
        False: numeric numpy arrays already of a column's type become the table's columns without a
        copy, so the table and the caller's arrays share memory (for large point tables whose arrays
        the caller hands over). Default True: the table owns its data.

    Returns
    -------
    DataFrame, shape (n, len(schema))
        Columns in schema order, each cast to its dtype, with a default ``RangeIndex``.

    Raises
    ------
    InputError
        (a ``ValueError``) for missing or extra columns, unequal lengths, non-1-D columns, values
        that do not fit a column's dtype (text in a number column, 2.5 in an integer column, ...).

    Examples
    --------
    >>> make_table(JUNCTION_COLUMNS).shape
    (0, 11)
    """
    return _build(schema, data, source=_ARRAY, share=not copy)


def write_csv(
    df: pd.DataFrame, path: str | os.PathLike[str], *, schema: tuple[Column, ...] | None = None
) -> None:
    """Write a table as deterministic CSV text, atomically.

    Parameters
    ----------
    df : DataFrame
        Table to write; it is validated and cast through :func:`make_table` first.
    path : str or path-like
        Destination file; its folder must exist. An existing file is replaced only once the new text
        is complete (temporary file in the same folder, then ``os.replace``).
    schema : tuple of Column, optional
        Schema of ``df``. By default, the schema in ``TABLE_SCHEMAS`` with ``df``'s column names.

    Notes
    -----
    Columns are written in schema order, floats as ``"%.9g"``, missing values as empty fields,
    ``"\\n"`` line endings, UTF-8, without the index. The same table gives byte-identical files.
    Rows are cast and written in blocks, so memory beyond ``df`` itself stays bounded (``df`` is
    never copied whole); a value that does not fit, found in any block, leaves no file behind.
    """
    path = Path(path)
    if not isinstance(df, pd.DataFrame):
        raise InputError(f"{path}: expected a pandas DataFrame, got {type(df).__name__}")
    if schema is None:
        schema = _find_schema(df, path)
    source = str(path)
    _check_schema(schema, source)
    if len(df.columns):
        _check_names(schema, [str(n) for n in df.columns], source)
    _write_atomic(_typed_blocks(schema, df, source=source), path)


def read_csv(path: str | os.PathLike[str], schema: tuple[Column, ...]) -> pd.DataFrame:
    """Read a table written by :func:`write_csv`, restoring the schema's dtypes.

    Parameters
    ----------
    path : str or path-like
        CSV file with a header row holding exactly the schema's column names (any order).
    schema : tuple of Column
        Schema of the file, e.g. ``POINT_COLUMNS``.

    Returns
    -------
    DataFrame, shape (n, len(schema))
        Columns in schema order with the schema's dtypes. Empty fields become NaN in float columns
        and ``<NA>`` in ``"Int64"`` columns; in text columns they stay the empty string, and text
        such as ``"01"`` is kept as written.

    Raises
    ------
    InputError
        If the file is missing, unreadable, has missing or extra columns, or a field does not fit
        its column's dtype.
    """
    path = Path(path)
    _check_schema(schema, str(path))
    header = _read_header(path)
    _check_names(schema, header, str(path))
    dtypes = {c.name: c.dtype for c in schema}
    na_values = {c.name: [""] for c in schema if c.dtype in ("float64", "Int64")}
    try:
        frame = pd.read_csv(
            path,
            dtype=dtypes,
            keep_default_na=False,
            na_values=na_values,
            encoding="utf-8",
        )
    except (ValueError, TypeError) as exc:
        reason = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise InputError(
            f"{path}: a field does not fit its column type ({reason}); regenerate the file"
        ) from exc
    return _build(schema, frame, source=str(path))


def columns_document(schemas: Mapping[str, tuple[Column, ...]]) -> dict[str, Any]:
    """Data dictionary for ``columns.json``: each column's unit, dtype and meaning, and conventions.

    Parameters
    ----------
    schemas : mapping of str to tuple of Column
        Table file name (e.g. ``"branches.csv"``) to its schema; ``TABLE_SCHEMAS`` gives all three.

    Returns
    -------
    dict
        ``{"tables": {file: [{"name", "unit", "dtype", "description"}, ...]},
        "conventions": {topic: text}}``, made of plain ``str``, ``list`` and ``dict`` only, so
        ``json.dumps`` accepts it.
    """
    tables: dict[str, list[dict[str, str]]] = {}
    for file_name, schema in schemas.items():
        if not isinstance(file_name, str) or not file_name:
            raise InputError(f"{_ARRAY}: table name {file_name!r} is not a string; use e.g. 'x.csv'")
        _check_schema(schema, file_name)
        tables[file_name] = [
            {"name": c.name, "unit": c.unit, "dtype": c.dtype, "description": c.description} for c in schema
        ]
    return {"tables": tables, "conventions": dict(_CONVENTIONS)}


def _check_schema(schema: Any, source: str) -> None:
    valid = isinstance(schema, tuple) and schema and all(isinstance(c, Column) for c in schema)
    if not valid:
        raise InputError(f"{source}: schema is not a non-empty tuple of Column; pass BRANCH_COLUMNS etc.")
    names = [c.name for c in schema]
    duplicates = sorted({n for n in names if names.count(n) > 1})
    if duplicates:
        raise InputError(f"{source}: schema repeats columns {duplicates}; give each column once")


def _check_names(schema: tuple[Column, ...], names: list[str], source: str) -> None:
    expected = [c.name for c in schema]
    missing = [n for n in expected if n not in names]
    extra = [n for n in names if n not in expected]
    repeated = sorted({n for n in names if names.count(n) > 1})
    problems = []
    if missing:
        problems.append(f"missing columns {missing}")
    if extra:
        problems.append(f"unexpected columns {extra}")
    if repeated:
        problems.append(f"repeated columns {repeated}")
    if problems:
        raise InputError(f"{source}: {' and '.join(problems)}; give exactly the schema's columns")


def _build(schema: tuple[Column, ...], data: Any, *, source: str, share: bool = False) -> pd.DataFrame:
    _check_schema(schema, source)
    if data is None:
        data = {}
    if isinstance(data, pd.DataFrame):
        names = [str(n) for n in data.columns]
        columns = {str(n): data.iloc[:, i] for i, n in enumerate(data.columns)}
    elif isinstance(data, Mapping):
        names = list(data.keys())
        columns = dict(data)
    else:
        kind = type(data).__name__
        raise InputError(f"{source}: expected a mapping of column name to values, got {kind}")
    if not names:
        columns = {c.name: [] for c in schema}
        names = list(columns)
    _check_names(schema, names, source)
    lengths = {}
    for name, values in columns.items():
        if _ndim(values) != 1:
            raise InputError(f"{source}: column {name!r} is not 1-D; pass one value per row")
        lengths[name] = len(values)
    if len(set(lengths.values())) > 1:
        raise InputError(f"{source}: columns differ in length {lengths}; give each column n values")
    cast = {}
    for c in schema:
        cast[c.name] = _cast(c, columns[c.name], source, share=share)
    return pd.DataFrame(cast, copy=False)


def _ndim(values: Any) -> int:
    """Dimensions of a column's values; -1 for ragged nested sequences.

    Not ``np.ndim``: on a list of texts that builds a fixed-width ``<U`` array as wide as the longest
    text times the row count (41,096 junction rows whose longest ``angles_deg`` has 1,349 characters:
    211 MB, 4 bytes per character); an object array holds one pointer per row, and the texts are not
    copied.
    """
    ndim = getattr(values, "ndim", None)
    if ndim is not None:
        return ndim if isinstance(ndim, int | np.integer) else -1
    try:
        arr = np.asarray(values, dtype=object)
    except ValueError:
        return -1
    # ragged rows stay objects inside a 1-D array; only a mixed column can hold them
    if arr.ndim == 1 and infer_dtype(arr, skipna=True) in ("mixed", "mixed-integer", "unknown-array"):
        if any(is_list_like(v) for v in arr):
            return -1
    return arr.ndim


_KINDS = {
    "float64": {"floating", "integer", "mixed-integer-float", "decimal", "empty"},
    "int64": {"integer", "floating", "mixed-integer-float", "empty"},
    "Int64": {"integer", "floating", "mixed-integer-float", "empty"},
    "string": {"string", "empty"},
    "bool": {"boolean", "empty"},
}


def _cast(column: Column, values: Any, source: str, *, share: bool = False) -> Any:
    if isinstance(values, pd.Series | pd.Index):
        # object columns as a plain array: infer_dtype reads pandas' wrapper of one as "unknown-array"
        values = values.to_numpy() if values.dtype == object else values.array
    if isinstance(values, np.ndarray) and values.ndim == 1:
        # plain numeric arrays need no inference and no nullable round trip (at most one copy)
        kind = values.dtype.kind
        fits = kind != "u" or not len(values) or int(values.max()) <= np.iinfo(np.int64).max
        if column.dtype == "float64" and kind in "fiu":
            return values.astype(np.float64, copy=not share)
        if column.dtype == "int64" and kind in "iu" and fits:
            return values.astype(np.int64, copy=not share)
        if column.dtype == "bool" and kind == "b":
            return values if share else values.copy()
    kind = infer_dtype(values, skipna=True)
    where = f"{source}: column {column.name!r} ({column.dtype})"
    if kind not in _KINDS[column.dtype]:
        raise InputError(f"{where} got {kind} values; pass {column.dtype} values")
    if column.dtype == "float64":
        return pd.array(values, dtype="Float64").to_numpy(dtype=np.float64, na_value=np.nan)
    missing = np.asarray(pd.isna(values), dtype=bool)
    if column.dtype in ("int64", "Int64"):
        try:
            ints = pd.array(values, dtype="Int64")
        except (TypeError, ValueError, OverflowError) as exc:
            raise InputError(f"{where} holds non-integer values; pass whole numbers") from exc
        if column.dtype == "Int64":
            return ints
        if missing.any():
            raise InputError(f"{where} has missing values; it cannot be empty, fill every row")
        return ints.to_numpy(dtype=np.int64)
    if missing.any():
        hint = "use '' for an empty text" if column.dtype == "string" else "fill every row"
        raise InputError(f"{where} has missing values; {hint}")
    if column.dtype == "string":
        return pd.array(values, dtype="string")
    return np.asarray(values, dtype=bool)


def _find_schema(df: pd.DataFrame, path: Path) -> tuple[Column, ...]:
    names = {str(n) for n in df.columns}
    for schema in TABLE_SCHEMAS.values():
        if names == {c.name for c in schema}:
            return schema
    raise InputError(f"{path}: columns match none of {list(TABLE_SCHEMAS)}; pass schema= to write_csv")


def _read_header(path: Path) -> list[str]:
    try:
        with open(path, encoding="utf-8", newline="") as handle:
            header = next(csv.reader(handle), None)
    except FileNotFoundError as exc:
        raise InputError(f"{path}: no such file; check the path") from exc
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"{path}: cannot be read as UTF-8 text ({exc}); check the file") from exc
    if not header:
        raise InputError(f"{path}: file is empty, expected a header row; regenerate it")
    return header


def _typed_blocks(schema: tuple[Column, ...], df: pd.DataFrame, *, source: str) -> Iterator[pd.DataFrame]:
    # Typed tables of _CSV_BLOCK_ROWS consecutive rows each (row slices of df are views); a zero-row
    # df still gives one (empty) block, which carries the header.
    step = _CSV_BLOCK_ROWS
    for start in range(0, max(len(df), 1), step):
        yield _build(schema, df.iloc[start : start + step], source=source)


def _write_atomic(blocks: Iterator[pd.DataFrame], path: Path) -> None:
    # The first block is cast before the temporary file exists, so a table whose first rows do not
    # fit fails exactly as before, without touching the folder; later blocks are written as cast.
    first: pd.DataFrame | None = next(blocks)
    options: dict[str, Any] = {
        "index": False,
        "float_format": _FLOAT_FORMAT,
        "na_rep": "",
        "lineterminator": "\n",
    }
    # A fresh name in the destination folder, so os.replace is an atomic rename on one file system;
    # os.open with mode 0o666 lets the process umask set permissions as for any ordinary new file.
    temp = path.with_name(f".{path.name}.{os.getpid()}.{secrets.token_hex(6)}.tmp")
    try:
        fd = os.open(temp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)
    except OSError as exc:
        raise InputError(
            f"{path}: cannot write ({exc.strerror}); check the folder exists and is writable"
        ) from exc
    try:
        with open(fd, "w", encoding="utf-8", newline="") as handle:
            first.to_csv(handle, header=True, **options)
            first = None  # one block in memory at a time
            for table in blocks:
                table.to_csv(handle, header=False, **options)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(temp, path)
    except BaseException as exc:
        temp.unlink(missing_ok=True)
        if isinstance(exc, OSError):
            raise InputError(
                f"{path}: cannot write ({exc.strerror}); check disk space and permissions"
            ) from exc
        raise
