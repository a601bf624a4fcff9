"""Participants and maps tables: missing values, numbers, encodings, shape.

The documented rule (README, Inputs): the missing-value markers are ``n/a``
(the BIDS marker; BIDS specification, "Tabular files") and an empty cell.  Any
other cell that is not a number in a mostly numeric model column -- including
markers of other programs and decimal commas -- is a problem naming the row,
column and value; a missing value in a model column is a problem, never a
dropped row.  Rows are numbered as a spreadsheet shows them (header = row 1).
"""

import pandas as pd
import pytest

from conftest import copy_cohort
from test_check import assert_refused, run_check


@pytest.fixture
def cohort_copy(tiny_cohort, tmp_path):
    return copy_cohort(tiny_cohort, tmp_path / "broken")


def _parts(a):
    return pd.read_csv(a.parent / "participants.tsv", sep="\t", dtype=str, keep_default_na=False)


def _maps(a):
    return pd.read_csv(a.parent / "maps.tsv", sep="\t", dtype=str, keep_default_na=False)


def _save(df, path):
    df.to_csv(path, sep="\t", index=False)


def _set_cell(a, table, row, col, value):
    """Set one cell; ``row`` is the 0-based data row, shown as row + 2 in a spreadsheet."""
    df = _parts(a) if table == "participants" else _maps(a)
    df.loc[row, col] = value
    _save(df, a.parent / f"{table}.tsv")


# ---------------------------------------------------------------------------
# missing-value markers and numbers
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("value", ["NaN", "nan", "N/A", "na", ".", "-", "null", "None", "NA"])
def test_foreign_missing_marker_in_numeric_column_is_named(cohort_copy, capsys, value):
    _set_cell(cohort_copy, "participants", 2, "age", value)
    assert_refused(cohort_copy, capsys,
                   ["participants.tsv row 4 column 'age'", f"'{value}' is not a number",
                    "missing-value markers are n/a and an empty cell"])


def test_decimal_comma_is_named_with_the_fix(cohort_copy, tmp_path, capsys):
    _set_cell(cohort_copy, "participants", 5, "age", "34,5")
    assert_refused(cohort_copy, capsys,
                   ["participants.tsv row 7 column 'age'", "'34,5' uses a decimal comma",
                    "write 34.5"], out=tmp_path / "out")


def test_word_in_numeric_column_is_named(cohort_copy, capsys):
    _set_cell(cohort_copy, "participants", 0, "age", "twenty")
    assert_refused(cohort_copy, capsys,
                   ["participants.tsv row 2 column 'age'", "'twenty' is not a number"])


@pytest.mark.parametrize("value", ["n/a", ""])
def test_documented_missing_value_in_model_column_is_a_problem(cohort_copy, tmp_path, capsys,
                                                               value):
    _set_cell(cohort_copy, "participants", 3, "age", value)
    assert_refused(cohort_copy, capsys,
                   ["participants.tsv row 5 column 'age'", "missing value",
                    "participant from both tables"], out=tmp_path / "out")


def test_foreign_marker_in_factor_column_is_not_a_silent_level(cohort_copy, capsys):
    p = _parts(cohort_copy)
    p.loc[[0, 1], "group"] = "NA"  # two of them: not caught by the one-participant rule
    _save(p, cohort_copy.parent / "participants.tsv")
    assert_refused(cohort_copy, capsys,
                   ["participants.tsv row 2 column 'group'", "participants.tsv row 3 column 'group'",
                    "'NA' looks like a missing-value marker"])


def test_markers_outside_model_columns_are_ignored(cohort_copy, capsys):
    p = _parts(cohort_copy)
    p["handedness"] = ["n/a", "NaN", "", "12,5", "7", "8", "9", "10"]
    _save(p, cohort_copy.parent / "participants.tsv")
    rc, text = run_check(cohort_copy, capsys)
    assert rc == 0, text


def test_rows_keep_their_spreadsheet_number_after_a_blank_line(cohort_copy, capsys):
    path = cohort_copy.parent / "participants.tsv"
    lines = path.read_text().splitlines()
    lines.insert(3, "")                       # blank line 4: sub-04 moves to line 6
    cells = lines[5].split("\t")
    assert cells[0] == "sub-04"
    cells[2] = "NaN"
    lines[5] = "\t".join(cells)
    path.write_text("\n".join(lines) + "\n")
    assert_refused(cohort_copy, capsys, ["participants.tsv row 6 column 'age'", "'NaN'"])


def test_one_level_factor_in_between_is_reported(cohort_copy, tmp_path, capsys):
    p = _parts(cohort_copy)
    p["site"] = "north"
    _save(p, cohort_copy.parent / "participants.tsv")
    cohort_copy.write_text(cohort_copy.read_text().replace('between = "group + age"',
                                                           'between = "group + age + site"'))
    assert_refused(cohort_copy, capsys, ["column 'site'", "single level ('north')",
                                         "remove site from [model] between"],
                   out=tmp_path / "out")


def test_blocks_column_with_a_missing_value(cohort_copy, tmp_path, capsys):
    p = _parts(cohort_copy)
    p["family"] = ["f1", "f1", "f2", "f2", "f3", "f3", "", "f4"]
    _save(p, cohort_copy.parent / "participants.tsv")
    cohort_copy.write_text(cohort_copy.read_text() + 'blocks = "family"\n')
    assert_refused(cohort_copy, capsys, ["participants.tsv row 8 column 'family'", "missing value"],
                   out=tmp_path / "out")


def test_blocks_column_that_does_not_exist(cohort_copy, capsys):
    cohort_copy.write_text(cohort_copy.read_text() + 'blocks = "family"\n')
    assert_refused(cohort_copy, capsys, ["column 'family'", "missing from the participants table"])


def test_missing_condition_in_maps_table(cohort_copy, capsys):
    _set_cell(cohort_copy, "maps", 4, "condition", "n/a")
    assert_refused(cohort_copy, capsys, ["maps.tsv row 6 column 'condition'", "missing value"])


def test_missing_path_in_maps_table(cohort_copy, capsys):
    _set_cell(cohort_copy, "maps", 2, "path", "n/a")
    assert_refused(cohort_copy, capsys, ["maps.tsv row 4", "empty path"])


def test_contrast_that_is_not_estimable(cohort_copy, capsys):
    # age_months = 12 * age makes the design rank-deficient; a raw-weights contrast on age
    # alone is then not estimable (not in the row space of X; glm.check_design's rule)
    p = _parts(cohort_copy)
    p["age_months"] = (p["age"].astype(int) * 12).astype(str)
    _save(p, cohort_copy.parent / "participants.tsv")
    body = cohort_copy.read_text().replace('between = "group + age"',
                                           'between = "group + age + age_months"')
    cohort_copy.write_text(body.replace('slope = "age"', "weights = { age = 1 }"))
    assert_refused(cohort_copy, capsys, ["contrast 'age_slope'", "not estimable"])


# ---------------------------------------------------------------------------
# encodings and the shape of the table
# ---------------------------------------------------------------------------

def test_latin1_participants_table(cohort_copy, tmp_path, capsys):
    p = _parts(cohort_copy)
    p["note"] = "ok"
    p.loc[4, "note"] = "reçu"
    (cohort_copy.parent / "participants.tsv").write_bytes(
        p.to_csv(sep="\t", index=False).encode("latin-1"))
    assert_refused(cohort_copy, capsys, ["participants.tsv", "line 6 is not valid UTF-8",
                                         "save it as UTF-8"], out=tmp_path / "out")


@pytest.mark.parametrize("codec", ["utf-16", "utf-16-le"])
def test_utf16_maps_table(cohort_copy, capsys, codec):
    path = cohort_copy.parent / "maps.tsv"
    path.write_bytes(path.read_text().encode(codec))
    assert_refused(cohort_copy, capsys, ["maps.tsv", "UTF-16", "save it as UTF-8"])


def test_tables_with_utf8_byte_order_mark_are_accepted(cohort_copy, capsys):
    for name in ("participants.tsv", "maps.tsv"):
        path = cohort_copy.parent / name
        path.write_bytes(b"\xef\xbb\xbf" + path.read_bytes())
    rc, text = run_check(cohort_copy, capsys)
    assert rc == 0, text


def test_participants_table_with_header_and_no_rows(cohort_copy, tmp_path, capsys):
    (cohort_copy.parent / "participants.tsv").write_text("participant_id\tgroup\tage\n")
    assert_refused(cohort_copy, capsys, ["participants.tsv", "has a header but no data rows"],
                   out=tmp_path / "out")


def test_empty_participants_table(cohort_copy, capsys):
    (cohort_copy.parent / "participants.tsv").write_text("")
    assert_refused(cohort_copy, capsys, ["participants.tsv", "is empty"])


def test_row_with_too_few_cells(cohort_copy, capsys):
    path = cohort_copy.parent / "maps.tsv"
    lines = path.read_text().splitlines()
    lines[3] = lines[3].rsplit("\t", 1)[0]      # row 4 loses its path cell
    path.write_text("\n".join(lines) + "\n")
    assert_refused(cohort_copy, capsys, ["maps.tsv row 4", "has 2 cells but the header has 3"])


def test_duplicate_column_name(cohort_copy, capsys):
    path = cohort_copy.parent / "participants.tsv"
    lines = path.read_text().splitlines()
    lines = [ln + ("\tage" if i == 0 else "\t30") for i, ln in enumerate(lines)]
    path.write_text("\n".join(lines) + "\n")
    assert_refused(cohort_copy, capsys, ["participants.tsv row 1", "column name 'age' appears "
                                         "more than once (columns 3, 4)"])


def test_unclosed_quote(cohort_copy, capsys):
    path = cohort_copy.parent / "participants.tsv"
    lines = path.read_text().splitlines()
    lines[2] = lines[2].replace("sub-02", '"sub-02')
    path.write_text("\n".join(lines) + "\n")
    assert_refused(cohort_copy, capsys, ["participants.tsv row", "double quotes"])


def test_trailing_tabs_and_spaces_are_tolerated(cohort_copy, capsys):
    path = cohort_copy.parent / "participants.tsv"
    lines = path.read_text().splitlines()
    lines = [ln.replace("\t", " \t") + "\t\t" for ln in lines]   # spreadsheet export habits
    path.write_text("\r\n".join(lines) + "\r\n\r\n")
    rc, text = run_check(cohort_copy, capsys)
    assert rc == 0, text
    assert "control 4, patient 4" in text


def test_row_with_an_extra_cell(cohort_copy, capsys):
    path = cohort_copy.parent / "participants.tsv"
    lines = path.read_text().splitlines()
    lines[4] += "\tleft-handed"                 # row 5 has a cell without a column
    path.write_text("\n".join(lines) + "\n")
    assert_refused(cohort_copy, capsys, ["participants.tsv row 5",
                                         "has 4 cells but the header has 3"])


def test_half_numeric_column_is_numeric(cohort_copy, capsys):
    # "mostly numeric" = at least as many numbers as other words (documented in README)
    p = _parts(cohort_copy)
    p.loc[[0, 2, 4, 6], "age"] = "unknown"
    _save(p, cohort_copy.parent / "participants.tsv")
    assert_refused(cohort_copy, capsys, [f"participants.tsv row {r} column 'age': 'unknown' is "
                                         "not a number" for r in (2, 4, 6, 8)])


def test_non_ascii_digits_are_not_numbers(cohort_copy, capsys):
    # Arabic-Indic three: a digit to Unicode, not a number in a table (common practice)
    _set_cell(cohort_copy, "participants", 1, "age", "\u0663\u0663")
    assert_refused(cohort_copy, capsys, ["participants.tsv row 3 column 'age'",
                                         "is not a number"])
