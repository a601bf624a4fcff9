"""The two tables: reading TSV files and checking them against each other.

Conventions (README, "Inputs"): UTF-8 text (:mod:`.textfile`), tab-separated,
a header row, double quotes as in CSV.  Row numbers in messages are the ones
a spreadsheet shows (the header is row 1).  The only missing-value markers
are an empty cell and ``n/a`` (BIDS); a missing value in a model column is a
problem, never a dropped row; any other non-number in a mostly numeric
model column is a problem naming the row, column and value.
"""

from __future__ import annotations

import csv
import io
import math
import re
from pathlib import Path

import pandas as pd

from .problems import ProblemList, closest
from .settings import Settings
from .textfile import TextFileError, read_text

ID = "participant_id"

#: The documented missing-value markers: an empty cell and ``n/a`` (BIDS).
MISSING = ("", "n/a")
#: Cells that other programs use for "missing" or "not a number".  They are not
#: markers here: in a model column each is a problem, never a silent number,
#: level or dropped row (compared ignoring case).
LOOKALIKES = frozenset({"na", "n/a", "n.a.", "n.a", "nan", "-nan", "null", "none", "nil", ".",
                        "-", "--", "?", "missing", "#n/a", "#na", "inf", "-inf", "+inf",
                        "infinity", "-infinity", "+infinity"})
_NUMBER = re.compile(r"[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?", re.ASCII)
_DECIMAL_COMMA = re.compile(r"[+-]?\d+,\d+", re.ASCII)


def read_table(path: Path, problems: ProblemList, label: str) -> pd.DataFrame | None:
    """Read a TSV with every cell as text (types are decided later).

    Conventions: UTF-8 (a byte-order mark is accepted, see
    :func:`groupsrc.inputs.settings.read_text`), tab-separated, a header row, double
    quotes as in CSV.  Cells and names are stripped of surrounding spaces.
    Blank lines are skipped.  The index of the returned frame is the row
    number a spreadsheet shows (the header is row 1), so problems can name it.
    Returns None (with problems added) when the table cannot be used.
    """
    if path is None:
        return None
    try:
        text = read_text(path)
    except FileNotFoundError:
        problems.add(path, f"{label} table not found",
                     "check the path in the analysis file (relative to the analysis file)")
        return None
    except TextFileError as exc:
        problems.add(path, exc.what, exc.fix)
        return None
    n_before = len(problems)
    rows = _tsvrows_text(text, path, problems)
    if rows is None:
        return None
    if not rows:
        problems.add(path, "is empty", "save the table with a header row and one row per entry")
        return None
    (_, header), body = rows[0], rows[1:]
    if len(header) == 1 and "," in header[0]:
        problems.add(path, "looks comma-separated, not tab-separated", "save it as TSV")
        return None
    header = _header(header, body, path, problems)
    data, index = [], []
    for line, cells in body:
        cells = _fit_row(cells, len(header), header, f"{path} row {line}", problems)
        if cells is not None:
            data.append(cells)
            index.append(line)
    if len(problems) > n_before:
        return None
    if not data:
        # returned empty, so that the header's columns are still checked
        problems.add(path, "has a header but no data rows",
                     f"add one row per {'participant' if label == 'participants' else 'entry'}")
    return pd.DataFrame(data, columns=header, index=pd.Index(index, name="row"), dtype=str)


def _tsvrows_text(text, path, problems):
    """[(row number, stripped cells)] without blank rows, or None on a quoting error."""
    reader = csv.reader(io.StringIO(text, newline=""), delimiter="\t", strict=True)
    rows = []
    try:
        for cells in reader:
            cells = [c.strip() for c in cells]
            if any(cells):
                rows.append((reader.line_num, cells))
    except csv.Error as exc:
        problems.add(f"{path} row {reader.line_num}", f"cannot be read ({exc})",
                     "check the double quotes on this row (a quoted cell must end with a quote)")
        return None
    return rows


def _header(header, body, path, problems):
    """Column names; unnamed trailing columns that are empty everywhere are dropped."""
    while header and not header[-1] and all(
            len(cells) < len(header) or not cells[len(header) - 1] for _, cells in body):
        header = header[:-1]
    for j, name in enumerate(header):
        if not name:
            problems.add(f"{path} row 1 column {j + 1}", "column has no name",
                         "give every column a name in the header row")
    for name in sorted({n for n in header if n and header.count(n) > 1}):
        cols = ", ".join(str(j + 1) for j, n in enumerate(header) if n == name)
        problems.add(f"{path} row 1", f"column name '{name}' appears more than once "
                     f"(columns {cols})", "give each column its own name")
    return header


def _fit_row(cells, n, header, where, problems):
    """The row's cells padded to the header; extra empty cells are dropped."""
    if len(cells) > n and not any(cells[n:]):
        cells = cells[:n]
    if len(cells) != n:
        problems.add(where, f"has {len(cells)} cells but the header has {n} "
                     f"({', '.join(header)})",
                     "give every row one tab-separated cell per column "
                     "(n/a or an empty cell for a missing value)")
        return None
    return cells


def rows_text(index) -> str:
    return ", ".join(str(int(i)) for i in index)


def _cell_kind(value: str) -> str:
    if value in MISSING:
        return "missing"
    if _NUMBER.fullmatch(value):
        return "number" if math.isfinite(float(value)) else "text"
    if _DECIMAL_COMMA.fullmatch(value):
        return "comma"
    if value.casefold() in LOOKALIKES:
        return "lookalike"
    return "text"


def _typed_columns(df: pd.DataFrame, checked, path, problems) -> pd.DataFrame:
    """Numbers for mostly numeric columns, text otherwise; problems for ``checked`` columns.

    A column is numeric when its cells that look like numbers (decimal
    point or decimal comma) are at least as many as its other text cells;
    the documented markers and the look-alikes in ``LOOKALIKES`` count for
    neither side.  In a checked (model) column every cell that is not a
    number of a numeric column, every look-alike marker and every missing
    value is a problem naming the row, column and value.  Missing cells
    become NaN.
    """
    out = df.copy()
    for col in out.columns:
        if col == ID:
            continue
        kinds = out[col].map(_cell_kind)
        n_num = int(kinds.isin(["number", "comma"]).sum())
        numeric = n_num > 0 and n_num >= int((kinds == "text").sum())
        if col in checked:
            _cell_problems(out[col], kinds, numeric, col, path, problems)
        if numeric:
            out[col] = pd.to_numeric(out[col].where(kinds == "number"), errors="coerce")
        else:
            # look-alikes are reported (model columns); they never count as a level there
            gone = ["missing", "lookalike"] if col in checked else ["missing"]
            out[col] = out[col].where(~kinds.isin(gone))
    return out


def _cell_problems(values, kinds, numeric, col, path, problems):
    for row, kind in kinds.items():
        v = values[row]
        where = f"{path} row {row} column '{col}'"
        if kind == "missing":
            problems.add(where, "missing value",
                         "fill it in, or remove the participant from both tables "
                         "(a model column cannot have missing values)")
        elif kind == "lookalike":
            problems.add(where, (f"'{v}' is not a number" if numeric else
                                 f"'{v}' looks like a missing-value marker")
                         + "; the only missing-value markers are n/a and an empty cell",
                         "write the real value (a model column cannot have missing values; "
                         "otherwise remove the participant from both tables)")
        elif numeric and kind == "comma":
            problems.add(where, f"'{v}' uses a decimal comma",
                         f"write {v.replace(',', '.')} (decimal point)")
        elif numeric and kind == "text":
            problems.add(where, f"'{v}' is not a number, but the column is numeric",
                         "write a number with a decimal point (e.g. 23.5)")


def model_columns(settings: Settings) -> list:
    """participants columns named by the between formula and the contrasts."""
    from .design import formula_variables
    cols = list(formula_variables(settings.model.get("between") or "1"))
    map_covs = map_covariates(settings)
    for c in settings.contrasts:
        if c.slope and c.slope not in map_covs:
            cols.append(c.slope)
        if c.compare:
            cols.extend(c.compare.keys())
    if settings.inference.get("blocks"):
        cols.append(settings.inference["blocks"])
    vg = settings.inference.get("variance_groups") or "auto"
    if vg not in VARIANCE_GROUP_MODES:
        cols.append(vg)
    seen = []
    for c in cols:
        if c not in seen:
            seen.append(c)
    return seen


#: the values of [inference] variance_groups that are not column names
VARIANCE_GROUP_MODES = ("auto", "none")


def map_covariates(settings: Settings) -> list:
    """Maps-table columns the mixed model uses as map-level covariates."""
    return list(settings.model.get("map_covariates") or []) if settings.model.get("mixed") else []


def check_tables(settings: Settings, problems: ProblemList):
    """Read and cross-check both tables. Returns (participants, maps, ppath, mpath).

    The tables come back with spreadsheet row numbers as their index; a
    table that cannot be used comes back as None (its problems added).
    """
    ppath = settings.resolve(settings.cohort.get("participants"))
    mpath = settings.resolve(settings.cohort.get("maps"))
    parts = read_table(ppath, problems, "participants") if ppath else None
    maps = read_table(mpath, problems, "maps") if mpath else None
    if parts is not None:
        parts = _check_participants(settings, parts, ppath, problems)
    if maps is not None:
        maps = _check_maps(settings, maps, mpath, problems)
    if parts is not None and maps is not None:
        _cross_check(settings, parts, maps, ppath, mpath, problems)
    if parts is not None:
        _check_levels(settings, parts, ppath, problems)
    return parts, maps, ppath, mpath


def _check_participants(settings, parts, ppath, problems):
    if ID not in parts.columns:
        problems.add(ppath, f"no '{ID}' column",
                     f"name the participant column '{ID}' (BIDS); "
                     + (closest(ID, parts.columns) or f"columns are: {', '.join(parts.columns)}"))
        return None
    ids = parts[ID]
    for row in parts.index[ids.isin(MISSING)]:
        problems.add(f"{ppath} row {row}", f"empty {ID}", "fill it in or delete the row")
    named = ids[~ids.isin(MISSING)]
    for pid in sorted(set(named[named.duplicated()])):
        problems.add(f"{ppath} rows {rows_text(parts.index[ids == pid])}",
                     f"participant '{pid}' listed more than once", "keep one row per participant")
    cols = model_columns(settings)
    for col in cols:
        if col not in parts.columns:
            problems.add(f"{ppath} column '{col}'",
                         "named by the model but missing from the participants table",
                         closest(col, parts.columns) or f"add the column; present: {', '.join(parts.columns)}")
    if parts.empty:
        return None
    return _typed_columns(parts, [c for c in cols if c in parts.columns], ppath, problems)


#: maps-table columns of surface maps in GIfTI: one file per hemisphere (README, "Surfaces")
HEMISPHERE_PATHS = ("path_left", "path_right")


def map_path_columns(maps: pd.DataFrame) -> list:
    """The columns of ``maps`` naming map files: 'path', or path_left / path_right."""
    cols = [c for c in HEMISPHERE_PATHS if c in maps.columns]
    return cols if cols and "path" not in maps.columns else ["path"]


def _check_maps(settings, maps, mpath, problems):
    within = settings.model.get("within")
    need = [ID] + map_path_columns(maps) + ([within] if within else [])
    for col in need:
        if col not in maps.columns:
            problems.add(f"{mpath} column '{col}'", "required column missing",
                         closest(col, maps.columns) or f"present: {', '.join(maps.columns)}")
    if maps.empty or not all(c in maps.columns for c in need):
        return None
    key = [ID] + ([within] if within else []) + (["session"] if "session" in maps.columns else [])
    for col in key:
        for row in maps.index[maps[col].isin(MISSING)]:
            problems.add(f"{mpath} row {row} column '{col}'", "missing value",
                         "fill it in or delete the row")
    # mixed model: maps of one participant and condition may differ by a map covariate
    key += [c for c in map_covariates(settings) if c in maps.columns and c not in key]
    complete = ~maps[key].isin(MISSING).any(axis=1)
    dup = maps.duplicated(subset=key, keep=False) & complete
    if dup.any():
        for _, grp in maps[dup].groupby(key, sort=False):
            what = ", ".join(f"{k}={grp.iloc[0][k]!r}" for k in key)
            problems.add(f"{mpath} rows {rows_text(grp.index)}", f"duplicate map for ({what})",
                         "keep one row per participant, condition and session"
                         + ("" if "session" in maps.columns else ", or add a 'session' column"))
    return _check_map_covariates(settings, maps, mpath, problems)


def _check_map_covariates(settings, maps, mpath, problems):
    """Map covariates: present, numeric in every cell (named problems), not constant."""
    covs = map_covariates(settings)
    missing = [c for c in covs if c not in maps.columns]
    for col in missing:
        problems.add(f"{mpath} column '{col}'",
                     "named by [model] map_covariates but missing from the maps table",
                     closest(col, maps.columns) or f"present: {', '.join(maps.columns)}")
    present = [c for c in covs if c in maps.columns]
    if not present:
        return maps
    typed = _typed_columns(maps[present], present, mpath, problems)
    for col in present:
        if not pd.api.types.is_numeric_dtype(typed[col]):
            problems.add(f"{mpath} column '{col}'", "a map covariate must be numeric, but the "
                         "column holds words", "write a number in every row (e.g. 42 or 0.5)")
        elif typed[col].notna().all() and typed[col].nunique() == 1:
            problems.add(f"{mpath} column '{col}'",
                         f"map covariate '{col}' has the same value in every map, so the "
                         "model cannot estimate it", "remove it from [model] map_covariates")
        else:
            maps[col] = typed[col]
    return maps


def _cross_check(settings, parts, maps, ppath, mpath, problems):
    within = settings.model.get("within")
    in_p = set(parts[ID]) - set(MISSING)
    in_m = set(maps[ID]) - set(MISSING)
    for pid in sorted(in_m - in_p):
        problems.add(f"{mpath} rows {rows_text(maps.index[maps[ID] == pid])}",
                     f"participant '{pid}' is not in {ppath.name}",
                     f"add a row for '{pid}' to {ppath.name} or remove these maps")
    for pid in sorted(in_p - in_m):
        problems.add(f"{ppath} row {rows_text(parts.index[parts[ID] == pid][:1])}",
                     f"participant '{pid}' has no maps in {mpath.name}",
                     f"add their maps to {mpath.name} or remove the row")
    if not within:
        return
    conds = set(maps[within]) - set(MISSING)
    for c in settings.contrasts:
        for level in (c.within or {}):
            if level not in conds:
                problems.add(f"{settings.path} contrast '{c.name}' within",
                             f"condition '{level}' does not occur in {mpath.name} column '{within}'",
                             closest(level, conds) or f"conditions are: {', '.join(sorted(conds))}")
    if settings.model.get("mixed"):
        return      # the mixed model uses every map; check reports the empty cells
    # every participant should have every condition
    levels = sorted(conds)
    have = maps[maps[ID].isin(in_m)].groupby(ID)[within].apply(set)
    for pid, got in have.items():
        lack = [lv for lv in levels if lv not in got]
        if lack:
            problems.add(f"{mpath} participant '{pid}'",
                         f"no map for condition(s) {', '.join(lack)}",
                         "add the maps, remove the participant (the summary-statistic "
                         "approach needs every condition per participant), or set mixed = "
                         "true under [model] (the mixed model uses every map)")


def _check_levels(settings, parts, ppath, problems):
    from .design import factor_columns, formula_variables
    present = [c for c in model_columns(settings) if c in parts.columns]
    between = formula_variables(settings.model.get("between") or "1")
    for col in factor_columns(settings, parts, present):
        counts = parts[col].value_counts()
        if col in between and len(counts) == 1:
            problems.add(f"{ppath} column '{col}'",
                         f"factor '{col}' has a single level ('{counts.index[0]}') for every "
                         "participant, so the model cannot estimate it (it would be dropped)",
                         f"remove {col} from [model] between, or check the table")
        for level, n in counts.items():
            if n < 2:
                problems.add(f"{ppath} column '{col}'",
                             f"level '{level}' has only {n} participant",
                             "a factor level needs at least 2 participants; merge or drop it")
    for c in settings.contrasts:
        if c.compare:
            for fac, levels in c.compare.items():
                if fac in parts.columns:
                    have = set(parts[fac].dropna().astype(str))
                    for lv in levels:
                        if str(lv) not in have:
                            problems.add(f"{settings.path} contrast '{c.name}' compare.{fac}",
                                         f"level '{lv}' does not occur in column '{fac}'",
                                         closest(str(lv), have) or f"levels are: {', '.join(sorted(have))}")
        if c.slope and c.slope in parts.columns and not pd.api.types.is_numeric_dtype(parts[c.slope]):
            problems.add(f"{ppath} column '{c.slope}'",
                         f"slope of contrast '{c.name}' needs a numeric column",
                         "every value must be a number")


def map_path(mpath: Path, rel: str) -> Path:
    """A maps-table path: relative to the folder of the maps table."""
    p = Path(rel).expanduser()
    return p if p.is_absolute() else (mpath.parent / p)


def real_path(path: Path) -> Path:
    """The path with '..' and symbolic links resolved (as given when that fails, e.g. a loop)."""
    try:
        return path.resolve()
    except (OSError, RuntimeError):
        return path.absolute()
