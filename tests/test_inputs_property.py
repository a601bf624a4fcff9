"""Random cell values in the tables: exit 0 or 1, never a traceback, never a changed input.

A property test (hypothesis): each example rewrites one table of a tiny cohort
with a few cells replaced by values drawn from markers, numbers, names, paths
and arbitrary text (tabs, quotes, line breaks and all), runs ``groupsrc
check`` and asserts the reliability rules of RULES.md: the exit code is 0 or 1,
no traceback is printed (``cli.main`` lets every exception but InputError
through, so a crash fails the example), and every file of the cohort is
byte-identical afterwards.  The cohort and the loading cache are made once per
test; only the table changes between examples.
"""

import json
import sys

import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from conftest import make_cohort
from groupsrc.cli import main
from test_check import tree_hashes

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

TOKENS = ["", "n/a", "NA", "N/A", "na", "NaN", "nan", "null", "None", ".", "-", "?", "inf",
          "-inf", "1e400", "34,5", "0", "-3", "1e3", " 42 ", "sub-01", "sub-02", "sub-99",
          "control", "patient", "rare", "frequent", "maps", "..", "/", "mask.nii.gz",
          "participants.tsv", "maps/sub-01_cond-rare.nii.gz",
          "./maps/../maps/sub-02_cond-rare.nii.gz", '"', '"quoted"', "a\tb", "x\ny",
          "\ufeff", "é", "C(age)", "group"]

#: characters that change a table's structure, drawn often on purpose
STRUCTURE = st.sampled_from(["\t", "\n", "\r", '"', " ", ",", ".", "-", "\x00"])
CELLS = st.one_of(st.sampled_from(TOKENS),
                  st.text(STRUCTURE, min_size=1, max_size=4),
                  st.text(st.one_of(STRUCTURE, st.characters(exclude_categories=["Cs"])),
                          max_size=10),
                  st.floats().map(str))


@pytest.fixture
def cohort(tmp_path):
    analysis = make_cohort(tmp_path / "cohort", n_per_group=3)
    originals = {name: pd.read_csv(analysis.parent / name, sep="\t", dtype=str,
                                   keep_default_na=False)
                 for name in ("participants.tsv", "maps.tsv")}
    return analysis, originals


def _write(path, df):
    """The table as TSV text, cells written verbatim (no quoting added)."""
    lines = ["\t".join(df.columns)] + ["\t".join(row) for row in df.itertuples(index=False)]
    path.write_bytes(("\n".join(lines) + "\n").encode("utf-8"))


def _check_exits_cleanly(analysis, capsys):
    """groupsrc check: exit 0 or 1, no traceback, every input byte-identical."""
    before = tree_hashes(analysis.parent)
    rc = main(["check", str(analysis)])
    cap = capsys.readouterr()
    text = cap.out + cap.err
    assert rc in (0, 1), text
    assert "Traceback" not in text, text
    assert tree_hashes(analysis.parent) == before


@settings(max_examples=60, deadline=None, derandomize=True, database=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture,
                                 HealthCheck.too_slow])
@given(data=st.data())
def test_random_cells_never_crash_or_touch_inputs(cohort, capsys, data):
    analysis, originals = cohort
    name = data.draw(st.sampled_from(sorted(originals)), label="table")
    df = originals[name].copy()
    edits = data.draw(st.lists(st.tuples(st.integers(0, len(df) - 1),
                                         st.integers(0, len(df.columns) - 1), CELLS),
                               min_size=1, max_size=3), label="edits")
    for row, col, value in edits:
        df.iat[row, col] = value
    try:
        _write(analysis.parent / name, df)
        _check_exits_cleanly(analysis, capsys)
    finally:
        _write(analysis.parent / name, originals[name])


# ---------------------------------------------------------------------------
# random values for every key of the analysis file
# ---------------------------------------------------------------------------

def _toml(value):
    """A TOML 1.0 value (inline form)."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if value != value:
            return "nan"
        if value in (float("inf"), float("-inf")):
            return "inf" if value > 0 else "-inf"
        return repr(value)
    if isinstance(value, str):
        return json.dumps(value, ensure_ascii=False)   # JSON strings are TOML basic strings
    if isinstance(value, list):
        return "[" + ", ".join(_toml(v) for v in value) + "]"
    return "{" + ", ".join(f"{json.dumps(k)} = {_toml(v)}" for k, v in value.items()) + "}"


def _dump(doc):
    lines = [f"{k} = {_toml(v)}" for k, v in doc.items() if not isinstance(v, (dict, list))
             or k not in ("cohort", "model", "inference", "contrasts")]
    for section in ("cohort", "model", "inference"):
        if section in doc:
            lines.append(f"[{section}]")
            lines += [f"{k} = {_toml(v)}" for k, v in doc[section].items()]
    for c in doc.get("contrasts", []):
        lines.append("[[contrasts]]")
        lines += [f"{k} = {_toml(v)}" for k, v in c.items()]
    return "\n".join(lines) + "\n"


SCALARS = st.one_of(st.integers(-2 ** 63, 2 ** 63 - 1), st.floats(), st.booleans(),
                    st.sampled_from(TOKENS + ["cluster-mass", "tfce", "two", "vertex", "age",
                                              "condition", "group + age", "group * age",
                                              "C(group)", "1", "0", "Rare_minus_frequent"]))
VALUES = st.recursive(SCALARS, lambda inner: st.one_of(
    st.lists(inner, max_size=3),
    st.dictionaries(st.sampled_from(["rare", "frequent", "group", "age", "Intercept", "x"]),
                    inner, max_size=3)), max_leaves=5)


@settings(max_examples=200, deadline=None, derandomize=True, database=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture,
                                 HealthCheck.too_slow])
@given(data=st.data())
def test_random_settings_values_never_crash_or_touch_inputs(cohort, capsys, data):
    from groupsrc.inputs.settings import SCHEMA
    analysis, _ = cohort
    original = analysis.read_text()
    doc = tomllib.loads(original)
    # every key but [cohort] cache: the loading cache is written where that key says
    keys = [(sec, key) for sec, keys in SCHEMA.items() for key in keys
            if (sec, key) != ("cohort", "cache")]
    for sec, key in data.draw(st.lists(st.sampled_from(keys), min_size=1, max_size=2),
                              label="keys"):
        value = data.draw(VALUES, label=f"{sec}.{key}")
        if sec == "":
            doc[key] = value
        elif sec == "contrasts":
            doc["contrasts"][0][key] = value
        elif sec == "inference.tfce":
            tfce = doc.setdefault("inference", {}).get("tfce")
            if not isinstance(tfce, dict):
                tfce = doc["inference"]["tfce"] = {}
            tfce[key] = value
        else:
            doc.setdefault(sec, {})[key] = value
    try:
        analysis.write_text(_dump(doc), encoding="utf-8")
        _check_exits_cleanly(analysis, capsys)
    finally:
        analysis.write_text(original)
