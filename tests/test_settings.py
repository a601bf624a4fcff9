"""Analysis files: templates parse, defaults apply, bad keys are named."""

from pathlib import Path

import pytest

from groupsrc.inputs.problems import InputError
from groupsrc.inputs.settings import SCHEMA, parse_settings, read_settings

ROOT = Path(__file__).resolve().parents[1]
TEMPLATES = sorted((ROOT / "analysis_templates").glob("*.toml"))


def test_there_are_templates_for_the_common_designs():
    names = {p.stem for p in TEMPLATES}
    assert {"within_condition", "two_groups", "group_by_condition", "covariate_slope",
            "mixed_sessions"} <= names


@pytest.mark.parametrize("path", TEMPLATES, ids=lambda p: p.stem)
def test_every_template_parses(path):
    s = parse_settings(path)
    assert s.contrasts and s.cohort["participants"] and s.cohort["maps"]


def test_defaults(tmp_path):
    p = tmp_path / "a.toml"
    p.write_text('[cohort]\nparticipants = "p.tsv"\nmaps = "m.tsv"\n'
                 '[[contrasts]]\nname = "x"\nwithin = {a = 1, b = -1}\n[model]\nwithin = "c"\n')
    s = parse_settings(p)
    for key, spec in SCHEMA["inference"].items():
        if key != "tfce":
            assert s.inference[key] == spec.default
    for key, spec in SCHEMA["inference.tfce"].items():
        assert s.inference["tfce"][key] == spec.default
    assert s.model["between"] == "1" and s.model["mixed"] is False
    assert s.resolve("p.tsv") == tmp_path / "p.tsv"


def test_bad_toml_names_the_line(tmp_path):
    p = tmp_path / "a.toml"
    p.write_text('[cohort]\nparticipants = "p.tsv\n')
    with pytest.raises(InputError) as exc:
        parse_settings(p)
    assert "not valid TOML" in str(exc.value) and "line 2" in str(exc.value)


def test_all_settings_problems_listed(tmp_path):
    p = tmp_path / "a.toml"
    p.write_text('titel = "x"\n[cohort]\nparticipant = "p.tsv"\n[inference]\n'
                 'tails = "both"\nalpha = 2\ntime_window = [0.5, 0.1]\n'
                 '[[contrasts]]\nname = "c"\nwithin = {a = 1, b = 1}\n')
    s, problems = read_settings(p)
    text = problems.format()
    for frag in ["key 'titel'", "did you mean 'title'?", "key 'participant'",
                 "did you mean 'participants'?", "'participants' is required",
                 "'both' is not one of", "alpha", "time_window", "must sum to 0",
                 "[model] within is not set"]:
        assert frag in text, text


def test_readme_documents_every_key():
    readme = (ROOT / "README.md").read_text()
    for section, keys in SCHEMA.items():
        for key in keys:
            assert f"`{key}`" in readme, f"README does not document {section}.{key}"


def test_readme_documents_every_table_column():
    from groupsrc.outputs.tables import COLUMNS
    readme = (ROOT / "README.md").read_text()
    for table, cols in COLUMNS.items():
        assert f"`{table}`" in readme
        for col in cols:
            assert f"`{col}`" in readme, f"README does not document {table} column {col}"
