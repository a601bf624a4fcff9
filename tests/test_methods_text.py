"""methods.md against the run it describes: one test per contrast kind.

Each test runs `groupsrc run` on the tiny random cohort of conftest.py and
compares the methods text with the run's own record (``run.json``: statistic,
df, scheme, resamples, within weights; its settings: what each contrast
compares) -- the record is written by the pipeline, not by the methods
generator, so a sentence that drifts from what the run did fails here.
Check values that are facts of the trade:

* the residual df of a GLM is n - rank(X) (common practice): 8 participants and
  the design [1, group, age] give 5; with a 3-level factor [1, site b, site c, age] 4;
* Hedges' small-sample factor J = 1 - 3 / (4 df - 1) (Hedges 1981);
* the standardized effect of a within-participant contrast tested on difference
  maps is d_z (mean difference over the SD of the differences; common practice,
  e.g. Lakens 2013, Front Psychol 4:863, from memory), not Hedges' g of two groups;
* partial eta squared belongs to F tests only (common practice).
"""

from __future__ import annotations

import json
import re

import pandas as pd
import pytest

from conftest import make_cohort
from groupsrc.cli import main
from test_mixed_check import _model, _unbalanced

GLM_CONTRASTS = """
[[contrasts]]
name = "tone"
within = { rare = 1, frequent = -1 }
[[contrasts]]
name = "groups"
compare = { group = ["patient", "control"] }
[[contrasts]]
name = "group_by_tone"
within = { rare = 1, frequent = -1 }
compare = { group = ["patient", "control"] }
[[contrasts]]
name = "age_slope"
slope = "age"
[[contrasts]]
name = "raw"
weights = { age = 1 }
"""

INFERENCE = """
[inference]
correction = "cluster-mass"
resamples = 20
seed = 5
forming_p = 0.05
"""


def _analysis(root, contrasts, between="group + age", unit='unit = "nA m"'):
    analysis = make_cohort(root)
    text = analysis.read_text()
    head = text.split("[[contrasts]]")[0].replace('between = "group + age"',
                                                  f'between = "{between}"')
    head = head.replace('mask = "mask.nii.gz"\n', f'mask = "mask.nii.gz"\n{unit}\n')
    analysis.write_text(head + contrasts + INFERENCE)
    return analysis


def _run(analysis, out):
    assert main(["run", str(analysis), "--out", str(out), "--quiet"]) == 0
    record = json.loads((out / "run.json").read_text())
    md = (out / "methods.md").read_text(encoding="utf-8")
    return record, md


def _sections(md):
    parts = re.split(r"^## (.+)$", md, flags=re.M)
    return {parts[i].strip(): parts[i + 1].strip() for i in range(1, len(parts) - 1, 2)}


def _sentence(text, name):
    """The model paragraph's sentence about contrast ``name``."""
    m = re.search(rf"For {re.escape(name)}, .*?(?= For |$)", text, flags=re.S)
    assert m, f"no sentence for {name} in: {text}"
    return m.group(0)


def _df(record, name):
    c = next(c for c in record["contrasts"] if c["name"] == name)
    return c


@pytest.fixture(scope="module")
def glm_run(tmp_path_factory):
    root = tmp_path_factory.mktemp("methods_glm")
    return _run(_analysis(root / "c", GLM_CONTRASTS), root / "out")


def _common(record, md):
    sec = _sections(md)
    assert list(sec)[:5] == ["Data", "Model", "Inference", "Effect sizes", "Short version"]
    # every contrast named with its scheme and its number of rearrangements (run.json)
    for c in record["contrasts"]:
        how = ("all distinct rearrangements" if c.get("exact") else
               f"{c['resamples']} random rearrangements")
        assert f"{c['name']}: {c['scheme']}, {how}" in sec["Inference"], c["name"]
    # family-wise error control per contrast is said
    assert "within each contrast" in sec["Inference"]
    # references numbered in the order of first citation, each cited
    body = md.split("## References")[0]
    firsts = [int(m) for m in re.findall(r"\[(\d+)\]", body)]
    seen = list(dict.fromkeys(firsts))
    assert seen == list(range(1, len(seen) + 1)), seen
    refs = re.findall(r"^(\d+)\. ", md.split("## References")[1], flags=re.M)
    assert [int(r) for r in refs] == seen
    return sec


def test_within_contrast_text_matches_the_run(glm_run):
    record, md = glm_run
    sec = _common(record, md)
    c = _df(record, "tone")
    assert c["statistic"] == "t" and c["df"] == [5]            # 8 - rank 3 (common practice)
    s = _sentence(sec["Model"], "tone")
    assert "within-participant weights (rare +1, frequent -1)" in s
    assert "main effect of condition" in s and "t statistic with 5 residual degrees" in s
    eff = [x for x in sec["Effect sizes"].split(". ") if "effect of tone" in x][0]
    assert "d_z" in eff and "Hedges' g:" not in eff


def test_between_contrast_text_matches_the_run(glm_run):
    record, md = glm_run
    sec = _common(record, md)
    c = _df(record, "groups")
    s = _sentence(sec["Model"], "groups")
    assert c["within"] is None and "averaged over conditions" in s
    assert "group patient and group control (patient minus control)" in s
    assert f"t statistic with {c['df'][0]} residual degrees" in s
    eff = [x for x in sec["Effect sizes"].split(". ") if "effect of groups" in x
           or "of groups" in x.split(" is ")[0]][0]
    assert "Hedges' g: the group difference over the pooled residual SD" in eff
    assert "within-participant weights" not in s        # no condition weights for this one


def test_interaction_contrast_text_matches_the_run(glm_run):
    record, md = glm_run
    sec = _common(record, md)
    c = _df(record, "group_by_tone")
    s = _sentence(sec["Model"], "group_by_tone")
    w = ", ".join(f"{k} {v:+g}" for k, v in c["within"].items())
    assert f"within-participant weights ({w})" in s and "(an interaction)" in s
    assert "patient minus control" in s


def test_slope_contrast_text_matches_the_run(glm_run):
    record, md = glm_run
    sec = _common(record, md)
    s = _sentence(sec["Model"], "age_slope")
    assert "change per unit of age" in s and "averaged over conditions" in s
    eff = [x for x in sec["Effect sizes"].split(". ") if "of age_slope" in x.split(" is ")[0]][0]
    assert "standardized slope" in eff and "Hedges' g:" not in eff


def test_weights_contrast_text_matches_the_run(glm_run):
    record, md = glm_run
    sec = _common(record, md)
    c = _df(record, "raw")
    s = _sentence(sec["Model"], "raw")
    named = ", ".join(f"{n} {w:+g}" for n, w in zip(c["coefficients"], c["weights"]) if w)
    assert f"the weights {named} over the design's columns" in s


def test_all_t_run_never_speaks_of_eta_squared_and_names_the_unit(glm_run):
    record, md = glm_run
    assert all(c["statistic"] == "t" for c in record["contrasts"])
    assert "eta squared" not in md and "noncentral F" not in md
    assert "in nA m" in _sections(md)["Data"]
    # the short version names every contrast and its number of significant clusters
    short = _sections(md)["Short version"]
    for c in record["contrasts"]:
        assert f"{c['name']}: " in short


def test_f_contrast_text_matches_the_run(tmp_path):
    root = tmp_path
    analysis = _analysis(root / "c", """
[[contrasts]]
name = "sites"
compare = { site = ["a", "b", "c"] }
""", between="site + age", unit="")
    parts = pd.read_csv(root / "c" / "participants.tsv", sep="\t")
    parts["site"] = ["a", "b", "c", "a", "b", "c", "a", "b"]
    parts.to_csv(root / "c" / "participants.tsv", sep="\t", index=False)
    record, md = _run(analysis, root / "out")
    sec = _common(record, md)
    c = _df(record, "sites")
    assert c["statistic"] == "F" and c["df"] == [2, 4]       # 8 - rank 4 (common practice)
    s = _sentence(sec["Model"], "sites")
    assert "any difference among the site levels a, b and c" in s
    assert "F statistic with 2 and 4 degrees of freedom" in s
    assert "partial eta squared" in sec["Effect sizes"]
    assert "Hedges" not in md                     # no t contrast: Hedges' factor not used
    assert "unit of the map values was not given" in sec["Data"]


def test_mixed_contrast_text_matches_the_run(tmp_path):
    analysis = _unbalanced(tmp_path / "c")
    _model(analysis, "mixed = true")
    body = analysis.read_text().replace("resamples = 50", "resamples = 20")
    analysis.write_text(body)
    record, md = _run(analysis, tmp_path / "out")
    sec = _common(record, md)
    summary = json.loads((tmp_path / "out" / "analysis_summary.json").read_text())
    mm = summary["mixed_model"]
    assert f"all {mm['n_maps']} maps of {mm['n_participants']} participants" in sec["Model"]
    for c in record["contrasts"]:
        assert c["model"] == "mixed"
        assert f"{c['name']} tested" in sec["Model"]
    assert "SD of a single map" in sec["Effect sizes"]
    assert "Satterthwaite" in sec["Model"]
    # sessions are used as they are by the mixed model: no averaging sentence
    assert "were averaged first" not in md
