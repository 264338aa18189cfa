"""Tests for vesselgeom.tables: schemas, typed construction, deterministic CSV and columns.json.

Independent references used below: Python's ``csv`` module (an RFC 4180 reader that shares no code
with pandas' C parser), Python's ``format(x, ".9g")`` (C99 ``%g`` semantics) for the expected
9-significant-digit text, pandas' own dtype objects for the expected dtypes, and ``json`` from the
standard library.
"""

from __future__ import annotations

import csv
import io
import json
import os
import tracemalloc

import numpy as np
import pandas as pd
import pytest

from vesselgeom.errors import InputError
from vesselgeom.tables import (
    BRANCH_COLUMNS,
    JUNCTION_COLUMNS,
    POINT_COLUMNS,
    TABLE_SCHEMAS,
    Column,
    columns_document,
    make_table,
    read_csv,
    write_csv,
)

# A schema exercising the two dtypes the three tables do not use much (bool, text ids).
EXTRA_COLUMNS = (
    Column("label", "string", "", "Text id such as '01'; never missing."),
    Column("ok", "bool", "1", "Whether the row passed; never missing."),
    Column("count", "Int64", "1", "Nullable count; empty when unknown."),
    Column("value_mm", "float64", "mm", "A length; empty when not defined."),
)
ALL_SCHEMAS = {**TABLE_SCHEMAS, "extra.csv": EXTRA_COLUMNS}

TEXT_POOL = [
    "",
    "01",
    "007",
    "short;fit_failed",
    "3-7:74.9;3-12:142.0",
    "a,b",
    'say "hi"',
    "naïve µm",
    "two\nlines",
]


def _random_data(schema, n, seed):
    """Column dict with values of every kind the dtype allows, including missing ones."""
    rng = np.random.default_rng(seed)
    data = {}
    for column in schema:
        if column.dtype == "int64":
            data[column.name] = rng.integers(-(10**12), 10**12, n)
        elif column.dtype == "Int64":
            values = rng.integers(0, 10**6, n).tolist()
            data[column.name] = [None if rng.random() < 0.3 else v for v in values]
        elif column.dtype == "float64":
            values = rng.normal(size=n) * 10.0 ** rng.integers(-12, 12, n)
            values[rng.random(n) < 0.2] = np.nan
            if n >= 3:
                values[:3] = [1.0 / 3.0, -0.0, 2.0**-30]
            data[column.name] = values
        elif column.dtype == "string":
            data[column.name] = [TEXT_POOL[i] for i in rng.integers(0, len(TEXT_POOL), n)]
        else:
            data[column.name] = rng.random(n) < 0.5
    return data


def _expected_dtype(column):
    # pandas' own dtype objects are the reference for what each schema dtype string means.
    return pd.Series([], dtype=column.dtype).dtype


@pytest.mark.parametrize("name", sorted(ALL_SCHEMAS))
@pytest.mark.parametrize("data", [None, {}, "empty-lists"])
def test_zero_row_tables_are_typed(name, data):
    # STYLE.md point 4, after scikit-image regionprops_table: no rows still gives typed columns.
    schema = ALL_SCHEMAS[name]
    if data == "empty-lists":
        data = {c.name: [] for c in schema}
    table = make_table(schema, data)
    assert table.shape == (0, len(schema))
    assert list(table.columns) == [c.name for c in schema]
    for column in schema:
        assert table[column.name].dtype == _expected_dtype(column), column.name


@pytest.mark.parametrize("name", sorted(ALL_SCHEMAS))
def test_zero_row_csv_is_header_only_and_reads_back_typed(tmp_path, name):
    schema = ALL_SCHEMAS[name]
    path = tmp_path / name
    write_csv(make_table(schema), path, schema=schema)
    # Python's csv module as independent reader: exactly one row, the header in schema order.
    rows = list(csv.reader(io.StringIO(path.read_text(encoding="utf-8"))))
    assert rows == [[c.name for c in schema]]
    back = read_csv(path, schema)
    assert back.shape == (0, len(schema))
    assert [back[c.name].dtype for c in schema] == [_expected_dtype(c) for c in schema]


@pytest.mark.parametrize("name", sorted(ALL_SCHEMAS))
def test_round_trip_keeps_dtypes_and_values_to_nine_digits(tmp_path, name):
    schema = ALL_SCHEMAS[name]
    data = _random_data(schema, 60, seed=7)
    path = tmp_path / name
    write_csv(make_table(schema, data), path, schema=schema)
    back = read_csv(path, schema)
    assert list(back.columns) == [c.name for c in schema]
    for column in schema:
        got = back[column.name]
        assert got.dtype == _expected_dtype(column), column.name
        if column.dtype == "float64":
            # Python format spec ".9g" (C99 %g semantics): the value must come back as exactly
            # the double nearest to its 9-significant-digit decimal text.
            want = [np.nan if np.isnan(v) else float(format(v, ".9g")) for v in data[column.name]]
            np.testing.assert_array_equal(got.to_numpy(), np.array(want))
        elif column.dtype == "Int64":
            want = pd.array(data[column.name], dtype="Int64")
            pd.testing.assert_extension_array_equal(got.array, want)
        else:
            # Text (including "", "01", quotes, commas, newlines), ints and bools come back exactly.
            assert got.tolist() == list(data[column.name]), column.name


def test_text_ids_and_empty_flags_stay_text(tmp_path):
    data = _random_data(BRANCH_COLUMNS, 2, seed=1)
    data["flags"] = ["", "01"]
    path = tmp_path / "branches.csv"
    write_csv(make_table(BRANCH_COLUMNS, data), path)
    back = read_csv(path, BRANCH_COLUMNS)
    assert back["flags"].tolist() == ["", "01"]
    assert not back["flags"].isna().any()


@pytest.mark.parametrize("name", sorted(ALL_SCHEMAS))
def test_writes_are_byte_identical(tmp_path, name):
    schema = ALL_SCHEMAS[name]
    data = _random_data(schema, 40, seed=3)
    first, second, third = (tmp_path / f"{k}.csv" for k in "abc")
    write_csv(make_table(schema, data), first, schema=schema)
    # Same content given with the keys in reverse order must give the same bytes.
    reversed_data = dict(reversed(list(data.items())))
    write_csv(make_table(schema, reversed_data), second, schema=schema)
    # Text read back and written again is a fixed point of the format.
    write_csv(read_csv(first, schema), third, schema=schema)
    raw = first.read_bytes()
    assert raw == second.read_bytes() == third.read_bytes()
    assert b"\r" not in raw.replace(b"two\nlines", b"")
    assert raw.endswith(b"\n")
    raw.decode("utf-8")


def test_nan_and_missing_ints_are_empty_fields(tmp_path):
    data = _random_data(BRANCH_COLUMNS, 2, seed=5)
    data["chord_mm"] = [np.nan, 2.0]
    data["distance_metric"] = [None, 1.0 / 3.0]
    data["start_node"] = [None, 4]
    path = tmp_path / "branches.csv"
    write_csv(make_table(BRANCH_COLUMNS, data), path)
    # Python's csv module as independent reader.
    rows = list(csv.DictReader(io.StringIO(path.read_text(encoding="utf-8"))))
    assert [r["chord_mm"] for r in rows] == ["", "2"]
    assert [r["start_node"] for r in rows] == ["", "4"]
    # C99 printf %.9g of 1/3 has nine significant digits.
    assert [r["distance_metric"] for r in rows] == ["", "0.333333333"]
    assert list(rows[0]) == [c.name for c in BRANCH_COLUMNS]


def test_write_csv_puts_columns_in_schema_order(tmp_path):
    data = _random_data(JUNCTION_COLUMNS, 3, seed=2)
    shuffled = pd.DataFrame(make_table(JUNCTION_COLUMNS, data).iloc[:, ::-1])
    path = tmp_path / "junctions.csv"
    write_csv(shuffled, path)  # schema found from the column names
    header = next(csv.reader(io.StringIO(path.read_text(encoding="utf-8"))))
    assert header == [c.name for c in JUNCTION_COLUMNS]


def test_read_csv_accepts_columns_in_any_order(tmp_path):
    names = [c.name for c in EXTRA_COLUMNS][::-1]
    path = tmp_path / "extra.csv"
    with open(path, "w", encoding="utf-8", newline="") as handle:
        writer = csv.writer(handle, lineterminator="\n")
        writer.writerow(names)
        writer.writerow(["2.5", "", "True", "01"])
    back = read_csv(path, EXTRA_COLUMNS)
    assert list(back.columns) == [c.name for c in EXTRA_COLUMNS]
    assert back.loc[0, "label"] == "01"
    assert back["ok"].dtype == np.dtype(bool) and back["ok"].tolist() == [True]
    assert back["count"].isna().all()
    assert back.loc[0, "value_mm"] == 2.5


def test_missing_and_extra_columns_raise_naming_them(tmp_path):
    data = _random_data(BRANCH_COLUMNS, 2, seed=4)
    del data["chord_mm"]
    data["bogus"] = [1, 2]
    with pytest.raises(InputError, match=r"chord_mm.*bogus"):
        make_table(BRANCH_COLUMNS, data)
    assert issubclass(InputError, ValueError)
    with pytest.raises(ValueError, match="bogus"):
        write_csv(pd.DataFrame(data), tmp_path / "b.csv", schema=BRANCH_COLUMNS)
    with pytest.raises(InputError, match="pass schema="):
        write_csv(pd.DataFrame(data), tmp_path / "b.csv")
    assert not (tmp_path / "b.csv").exists()
    path = tmp_path / "points.csv"
    path.write_text("branch_id,arc_mm\n1,0.5\n", encoding="utf-8")
    with pytest.raises(InputError, match=r"points\.csv.*missing columns.*x_mm"):
        read_csv(path, POINT_COLUMNS)


@pytest.mark.parametrize(
    ("column", "values", "message"),
    [
        ("arc_mm", ["1.0", "2.0"], "string values"),
        ("branch_id", [1, 2.5], "non-integer"),
        ("branch_id", [1, np.nan], "missing"),
        ("branch_id", [True, False], "boolean"),
        ("x_mm", [1.0], "differ in length"),
        ("y_mm", np.zeros((2, 3)), "not 1-D"),
        ("y_mm", [[1.0, 2.0], [3.0, 4.0]], "not 1-D"),
        ("y_mm", [[1.0, 2.0], [3.0]], "not 1-D"),
        ("y_mm", [1.0, (2.0, 3.0)], "not 1-D"),
        ("branch_id", [1, (2, 3)], "not 1-D"),
    ],
)
def test_values_that_do_not_fit_raise(column, values, message):
    data = _random_data(POINT_COLUMNS, 2, seed=6)
    data[column] = values
    with pytest.raises(InputError, match=message):
        make_table(POINT_COLUMNS, data)


def test_long_texts_are_not_copied_into_a_fixed_width_array():
    # Source: NumPy's documented string inference (numpy.array on a list of str gives a '<U{longest}'
    # array, 4 bytes per character for every row), so np.ndim on 20,000 rows with one 1,000-character
    # text allocates about 80 MB; the table itself needs about 2 MB here
    n = 20_000
    data = _random_data(JUNCTION_COLUMNS, n, seed=9)
    data["angles_deg"] = ["1-2:90.0"] * (n - 1) + ["x" * 1_000]
    tracemalloc.start()
    try:
        table = make_table(JUNCTION_COLUMNS, data)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert table["angles_deg"].iloc[-1] == "x" * 1_000
    assert peak < 20 * 2**20, f"make_table peaked at {peak / 2**20:.0f} MiB"


@pytest.mark.parametrize(
    ("values", "message"),
    [
        ([1, 2], "integer values"),
        ([None, ""], "''"),
        ([["a"], ["b", "c"]], "not 1-D"),
        (["a", ("b",)], "not 1-D"),
    ],
)
def test_text_columns_reject_numbers_and_missing(values, message):
    data = _random_data(JUNCTION_COLUMNS, 2, seed=8)
    data["branch_ids"] = values
    with pytest.raises(InputError, match=message):
        make_table(JUNCTION_COLUMNS, data)


def test_read_csv_errors_name_the_file(tmp_path):
    with pytest.raises(InputError, match=r"nope\.csv: no such file"):
        read_csv(tmp_path / "nope.csv", EXTRA_COLUMNS)
    path = tmp_path / "bad.csv"
    path.write_text("label,ok,count,value_mm\n01,True,abc,1\n", encoding="utf-8")
    with pytest.raises(InputError, match=r"bad\.csv: a field does not fit"):
        read_csv(path, EXTRA_COLUMNS)
    (tmp_path / "empty.csv").write_bytes(b"")
    with pytest.raises(InputError, match=r"empty\.csv: file is empty"):
        read_csv(tmp_path / "empty.csv", EXTRA_COLUMNS)


def test_write_is_atomic_and_leaves_no_temporary_file(tmp_path, monkeypatch):
    schema = EXTRA_COLUMNS
    path = tmp_path / "extra.csv"
    write_csv(make_table(schema, _random_data(schema, 5, seed=9)), path, schema=schema)
    before = path.read_bytes()
    # A table that fails validation never touches the existing file.
    with pytest.raises(InputError):
        write_csv(pd.DataFrame({"label": ["x"]}), path, schema=schema)

    # A failure at the final rename leaves the old file intact and removes the temporary file.
    def failing_replace(src, dst):
        raise PermissionError(13, "Permission denied")

    monkeypatch.setattr(os, "replace", failing_replace)
    with pytest.raises(InputError, match=r"extra\.csv: cannot write"):
        write_csv(make_table(schema, _random_data(schema, 5, seed=10)), path, schema=schema)
    monkeypatch.undo()
    assert path.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["extra.csv"]


def test_written_file_permissions_follow_umask(tmp_path):
    # POSIX open(2): a new file gets mode 0o666 & ~umask, as any ordinary write would give.
    umask = os.umask(0o022)
    try:
        path = tmp_path / "points.csv"
        write_csv(make_table(POINT_COLUMNS), path)
        assert path.stat().st_mode & 0o777 == 0o644
    finally:
        os.umask(umask)


def test_spec_names_and_dtypes():
    # The tables brief fixes names, order and these dtypes (nullable node ids, counts, text lists).
    dtypes = {c.name: c.dtype for c in BRANCH_COLUMNS}
    assert dtypes["start_node"] == dtypes["end_node"] == "Int64"
    assert dtypes["kind"] == dtypes["flags"] == "string"
    assert dtypes["inflection_count"] == dtypes["n_points"] == dtypes["branch_id"] == "int64"
    junction = {c.name: c.dtype for c in JUNCTION_COLUMNS}
    assert junction["branch_ids"] == junction["angles_deg"] == "string"
    assert junction["degree"] == "int64"
    assert [c.name for c in BRANCH_COLUMNS] == (
        "branch_id component_id kind start_node end_node length_mm chord_mm distance_metric "
        "inflection_count inflection_count_metric sum_of_angles_per_mm mean_curvature_per_mm "
        "max_curvature_per_mm total_curvature_rad mean_torsion_per_mm mean_abs_torsion_per_mm "
        "total_abs_torsion_rad torsion_defined_fraction mean_radius_mm min_radius_mm "
        "max_radius_mm start_x_mm start_y_mm start_z_mm end_x_mm end_y_mm end_z_mm step_mm "
        "n_points flags"
    ).split()
    assert [c.name for c in POINT_COLUMNS] == (
        "branch_id arc_mm x_mm y_mm z_mm curvature_per_mm torsion_per_mm radius_mm "
        "tangent_x tangent_y tangent_z in_summary"
    ).split()
    assert [c.name for c in JUNCTION_COLUMNS] == (
        "node_id component_id x_mm y_mm z_mm degree branch_ids radius_mm min_angle_deg "
        "max_angle_deg angles_deg"
    ).split()


IDENTIFIERS = {
    "branch_id",
    "component_id",
    "node_id",
    "start_node",
    "end_node",
    "kind",
    "flags",
    "branch_ids",
    "in_summary",
}


@pytest.mark.parametrize("name", sorted(TABLE_SCHEMAS))
def test_every_column_has_unit_and_description(name):
    # Convention (SI brochure, 9th ed., 5.4.7): '1' for dimensionless numbers; '' only for
    # identifiers and text labels, which are not quantities.
    for column in TABLE_SCHEMAS[name]:
        text = column.description
        assert len(text) > 40 and text.strip() == text, column.name
        assert "empty" in text.lower() or "missing" in text.lower(), column.name
        if column.name in IDENTIFIERS:
            assert column.unit == "", column.name
            continue
        assert column.unit in {"mm", "1/mm", "rad", "rad/mm", "deg", "1"}, column.name
        if column.name.endswith("_per_mm"):
            assert column.unit in {"1/mm", "rad/mm"}, column.name
        elif column.name.endswith("_mm"):
            assert column.unit == "mm" and column.dtype == "float64", column.name
        elif column.name.endswith("_rad"):
            assert column.unit == "rad", column.name
        elif column.name.endswith("_deg"):
            assert column.unit == "deg", column.name
        else:
            assert column.unit == "1", column.name


def test_column_rejects_unknown_dtype_and_empty_description():
    with pytest.raises(InputError, match="float32"):
        Column("a_mm", "float32", "mm", "A length.")
    with pytest.raises(InputError, match="no description"):
        Column("a_mm", "float64", "mm", "  ")
    with pytest.raises(InputError, match="repeats"):
        make_table((EXTRA_COLUMNS[0], EXTRA_COLUMNS[0]))


def test_columns_document_is_json_and_complete():
    document = columns_document(TABLE_SCHEMAS)
    # The standard library json module is the reference for "JSON-serialisable".
    assert json.loads(json.dumps(document)) == document
    assert list(document["tables"]) == ["branches.csv", "points.csv", "junctions.csv"]
    for file_name, schema in TABLE_SCHEMAS.items():
        entries = document["tables"][file_name]
        assert [e["name"] for e in entries] == [c.name for c in schema]
        assert all(set(e) == {"name", "unit", "dtype", "description"} for e in entries)
    conventions = document["conventions"]
    # Frenet-Serret sign convention (do Carmo 1976): dB/ds = -tau N, right-handed helix tau > 0.
    assert "dB/ds = -tau N" in conventions["frame"]
    assert "B = T x N" in conventions["frame"]
    assert "right-handed helix has positive torsion" in conventions["frame"]
    assert "affine" in conventions["coordinates"] and "mm" in conventions["coordinates"]
    assert "degrees" in conventions["angles"]
    assert "empty field" in conventions["missing"].lower()
    with pytest.raises(InputError):
        columns_document({"bad.csv": ("not a column",)})


def test_make_table_owns_its_data_unless_told_not_to():
    # numpy's np.shares_memory is the reference for whether two arrays share a buffer
    from vesselgeom.tables import POINT_COLUMNS

    cols = {c.name: np.zeros(4, bool if c.dtype == "bool" else c.dtype) for c in POINT_COLUMNS}
    owned = make_table(POINT_COLUMNS, cols)
    shared = make_table(POINT_COLUMNS, cols, copy=False)
    assert not np.shares_memory(owned["x_mm"].to_numpy(), cols["x_mm"])
    assert np.shares_memory(shared["x_mm"].to_numpy(), cols["x_mm"])


def test_unsigned_values_beyond_int64_are_refused():
    from vesselgeom.tables import POINT_COLUMNS

    cols = {c.name: np.zeros(2, bool if c.dtype == "bool" else c.dtype) for c in POINT_COLUMNS}
    cols["branch_id"] = np.array([2**63 + 5, 1], np.uint64)  # does not fit int64 (numpy iinfo)
    with pytest.raises(InputError):
        make_table(POINT_COLUMNS, cols)


def _to_csv_reference(table):
    # pandas' DataFrame.to_csv on the whole typed table at once, with the options the module
    # documents (schema order, "%.9g", empty missing fields, "\n", no index): the single-pass text.
    text = table.to_csv(index=False, float_format="%.9g", na_rep="", lineterminator="\n")
    return text.encode("utf-8")


def _files(folder):
    return sorted(p.name for p in folder.iterdir())


@pytest.mark.parametrize("name", ["extra.csv", "points.csv", "branches.csv"])
def test_block_writes_equal_one_block_and_pandas(tmp_path, monkeypatch, name):
    import vesselgeom.tables as tables

    schema = ALL_SCHEMAS[name]
    data = _random_data(schema, 3001, seed=11)  # NaN, bools, text with quotes/newlines, Int64 NA
    table = make_table(schema, data)
    monkeypatch.setattr(tables, "_CSV_BLOCK_ROWS", 10**6)  # larger than the table: one block
    write_csv(table, tmp_path / "one.csv", schema=schema)
    monkeypatch.setattr(tables, "_CSV_BLOCK_ROWS", 7)  # 429 blocks, the last one partial
    write_csv(table, tmp_path / "seven.csv", schema=schema)
    # reversed column order and a non-default index give the same text
    shuffled = table.iloc[:, ::-1].set_axis(np.arange(len(table))[::-1] * 3)
    write_csv(shuffled, tmp_path / "shuffled.csv", schema=schema)
    one = (tmp_path / "one.csv").read_bytes()
    assert one == (tmp_path / "seven.csv").read_bytes() == (tmp_path / "shuffled.csv").read_bytes()
    assert one == _to_csv_reference(table)
    # Python's csv module as independent reader: header plus one record per row
    assert len(list(csv.reader(io.StringIO(one.decode("utf-8"))))) == 3001 + 1


@pytest.mark.parametrize("rows", [7, 14, 15])
def test_block_boundaries_at_table_end(tmp_path, monkeypatch, rows):
    import vesselgeom.tables as tables

    table = make_table(EXTRA_COLUMNS, _random_data(EXTRA_COLUMNS, rows, seed=rows))
    monkeypatch.setattr(tables, "_CSV_BLOCK_ROWS", 7)  # exactly one, exactly two, two plus one row
    write_csv(table, tmp_path / "t.csv", schema=EXTRA_COLUMNS)
    # pandas' whole-table to_csv is the reference text
    assert (tmp_path / "t.csv").read_bytes() == _to_csv_reference(table)


@pytest.mark.parametrize("name", sorted(ALL_SCHEMAS))
def test_blocked_empty_table_is_header_only(tmp_path, monkeypatch, name):
    import vesselgeom.tables as tables

    schema = ALL_SCHEMAS[name]
    monkeypatch.setattr(tables, "_CSV_BLOCK_ROWS", 7)
    write_csv(make_table(schema), tmp_path / name, schema=schema)
    # RFC 4180 header record: the names joined by commas, then the "\n" line ending
    assert (tmp_path / name).read_bytes() == (",".join(c.name for c in schema) + "\n").encode()
    assert _files(tmp_path) == [name]


def test_blocked_write_of_memmap_columns_copies_nothing_whole(tmp_path, monkeypatch):
    import tracemalloc

    import vesselgeom.tables as tables

    n = 40_000
    data = _random_data(POINT_COLUMNS, n, seed=12)
    maps = {}
    for column in POINT_COLUMNS:
        file = tmp_path / f"{column.name}.npy"
        np.save(file, np.asarray(data[column.name]))
        # numpy's np.load(mmap_mode=...) maps the file: read-only ("r") or copy-on-write ("c")
        maps[column.name] = np.load(file, mmap_mode="r" if column.dtype == "float64" else "c")
    table = make_table(POINT_COLUMNS, maps, copy=False)
    assert np.shares_memory(table["x_mm"].to_numpy(), maps["x_mm"])  # numpy: no copy was made
    size = sum(values.nbytes for values in maps.values())
    out = tmp_path / "out"
    out.mkdir()
    peaks = {}
    for rows in (500, 10**6):
        monkeypatch.setattr(tables, "_CSV_BLOCK_ROWS", rows)
        # tracemalloc (standard library) sees numpy's and pandas' buffers: the peak of new memory
        tracemalloc.start()
        try:
            write_csv(table, out / f"{rows}.csv", schema=POINT_COLUMNS)
            peaks[rows] = tracemalloc.get_traced_memory()[1]
        finally:
            tracemalloc.stop()
    # one block of the whole table copies at least the table; blocks of 500 rows a small part of it
    assert peaks[10**6] > size and peaks[500] < size / 4
    # pandas' whole-table to_csv of an in-memory copy is the reference text
    reference = _to_csv_reference(make_table(POINT_COLUMNS, data))
    assert (out / "500.csv").read_bytes() == (out / f"{10**6}.csv").read_bytes() == reference


@pytest.mark.parametrize(
    ("column", "values", "message"),
    [
        # pandas' "str" dtype with NaN: a missing text, refused as make_table refuses it
        ("label", pd.Series(["x"] * 120, dtype="str"), "missing values"),
        # float64 values for the nullable integer column: 2.5 is no integer (pandas Int64 cast)
        ("count", pd.Series(np.arange(120.0)), "non-integer"),
    ],
)
def test_bad_value_in_late_block_leaves_no_file(tmp_path, monkeypatch, column, values, message):
    import vesselgeom.tables as tables

    frame = make_table(EXTRA_COLUMNS, _random_data(EXTRA_COLUMNS, 120, seed=13))
    values = values.copy()
    values[50] = np.nan if column == "label" else 2.5  # row 50: in the eighth block of 7 rows
    frame[column] = values
    built = []
    original = tables._build

    def counting_build(*args, **kwargs):
        built.append(len(args[1]))
        return original(*args, **kwargs)

    monkeypatch.setattr(tables, "_build", counting_build)
    monkeypatch.setattr(tables, "_CSV_BLOCK_ROWS", 7)
    seen = []
    real_open = os.open

    def spying_open(file, *args, **kwargs):
        seen.append(os.fspath(file))
        return real_open(file, *args, **kwargs)

    monkeypatch.setattr(os, "open", spying_open)
    with pytest.raises(InputError, match=rf"t\.csv: column '{column}'.*{message}"):
        write_csv(frame, tmp_path / "t.csv", schema=EXTRA_COLUMNS)
    # the failure came from the eighth block, after the temporary file was opened and written to
    assert built == [7] * 8
    assert len(seen) == 1 and seen[0].endswith(".tmp")
    assert _files(tmp_path) == []  # neither the table nor the temporary file is left


def test_text_in_float_column_leaves_no_file(tmp_path, monkeypatch):
    import vesselgeom.tables as tables

    frame = make_table(EXTRA_COLUMNS, _random_data(EXTRA_COLUMNS, 120, seed=14))
    values = frame["value_mm"].astype(object)
    values[50] = "1.5"  # text at row 50 of a float column
    frame["value_mm"] = values
    monkeypatch.setattr(tables, "_CSV_BLOCK_ROWS", 7)
    # make_table refuses the same frame; write_csv must refuse it too and leave the folder empty
    with pytest.raises(InputError, match="column 'value_mm'"):
        make_table(EXTRA_COLUMNS, frame)
    with pytest.raises(InputError, match=r"t\.csv: column 'value_mm' \(float64\)"):
        write_csv(frame, tmp_path / "t.csv", schema=EXTRA_COLUMNS)
    assert _files(tmp_path) == []


@pytest.mark.parametrize("name", ["points.csv", "junctions.csv"])
def test_object_dtype_columns_with_fitting_values_are_accepted(name):
    # reference: the same table from its typed columns; pandas hands object columns (e.g. after
    # astype(object) or from mixed sources) to make_table, which must read their values, not refuse them
    schema = TABLE_SCHEMAS[name]
    typed = make_table(schema, _random_data(schema, 9, seed=21))
    objects = typed.astype(object)
    assert all(objects[c].dtype == object for c in objects.columns)
    pd.testing.assert_frame_equal(make_table(schema, objects), typed, check_exact=True)
