"""`groupsrc check` for the mixed model: what it reports about an unbalanced cohort,
and every mixed-model problem refused with its culprit named (exit 1, no
traceback, inputs byte-identical; the project's rule for bad input)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from conftest import make_cohort
from test_check import assert_refused, run_check


def _unbalanced(root, drop=(("sub-03", "frequent", None), ("sub-05", None, "2"))):
    """The tiny cohort (8 participants, 2 conditions, 2 sessions) with rows removed:
    by default sub-03 lacks 'frequent' (an empty cell) and sub-05 a second session."""
    analysis = make_cohort(root, sessions=["1", "2"])
    maps = pd.read_csv(root / "maps.tsv", sep="\t", dtype=str)
    for pid, cond, ses in drop:
        sel = maps.participant_id == pid
        if cond:
            sel &= maps.condition == cond
        if ses:
            sel &= maps.session == ses
        maps = maps[~sel]
    maps.to_csv(root / "maps.tsv", sep="\t", index=False)
    return analysis


def _model(analysis, text):
    body = analysis.read_text().replace('within = "condition"\n',
                                        'within = "condition"\n' + text + "\n", 1)
    analysis.write_text(body)


def _maps_column(root, name, values):
    maps = pd.read_csv(root / "maps.tsv", sep="\t", dtype=str)
    maps[name] = values(maps)
    maps.to_csv(root / "maps.tsv", sep="\t", index=False)


def test_check_reports_maps_per_participant_and_empty_cells(tmp_path, capsys):
    analysis = _unbalanced(tmp_path / "c")
    _model(analysis, "mixed = true")
    rc, text = run_check(analysis, capsys)
    assert rc == 0, text
    maps = pd.read_csv(tmp_path / "c" / "maps.tsv", sep="\t")      # pandas, not groupsrc
    counts = maps.participant_id.value_counts()
    assert "  empty cells  : sub-03 frequent" in text.splitlines(), text
    assert f"{(counts == 4).sum()} with 4 maps" in text
    assert f"{(counts == 2).sum()} with 2 maps (sub-03, sub-05)" in text
    # fixed effects: (intercept, group, age) x (intercept, condition) -- the model's terms
    assert f"mixed model  : REML, {len(maps)} maps x 6 coefficients" in text
    assert "[t, sign-flip, mixed model]" in text and "[t, permutation, mixed model]" in text


def test_glm_refuses_a_participant_lacking_a_condition_and_names_the_way_out(tmp_path, capsys):
    analysis = _unbalanced(tmp_path / "c")
    assert_refused(analysis, capsys, ["participant 'sub-03'", "no map for condition(s) frequent",
                                      "set mixed = true"], out=tmp_path / "out")


def test_glm_contrasts_of_a_mixed_analysis_leave_out_incomplete_participants(tmp_path, capsys):
    analysis = _unbalanced(tmp_path / "c")
    _model(analysis, "mixed = true")
    analysis.write_text(analysis.read_text().replace(
        'name = "age_slope"\nslope = "age"', 'name = "age_slope"\nslope = "age"\nmodel = "glm"'))
    rc, text = run_check(analysis, capsys)
    assert rc == 0, text
    assert "GLM contrasts: leave out sub-03" in text
    n = len(pd.read_csv(analysis.parent / "participants.tsv", sep="\t"))   # pandas
    assert f"{n} participants ({n - 1} in the GLM contrasts, see below)" in text
    # the GLM's groups are now 3 and 4 participants: variance groups by default
    # (inputs/design.py, variance_groups = "auto"), Welch's v with sign flips
    assert "age_slope [Welch v, sign-flip] " in text
    assert "variance groups: group (control 3, patient 4)" in text


@pytest.mark.parametrize("key,value", [("map_covariates", '["trials"]'),
                                       ("random_slopes", '["condition"]'),
                                       ("estimation", '"ml"')])
def test_mixed_keys_without_mixed_are_refused(tiny_cohort, tmp_path, capsys, key, value):
    _maps_column(tiny_cohort.parent, "trials", lambda m: [str(30 + i % 7) for i in range(len(m))])
    _model(tiny_cohort, f"{key} = {value}")
    fragments = [f"[model] {key}"] + (["needs mixed = true", "set mixed = true"]
                                      if key != "estimation" else ["mixed model only"])
    assert_refused(tiny_cohort, capsys, fragments, out=tmp_path / "out")


def test_a_random_slope_on_a_term_constant_within_participants(tmp_path, capsys):
    analysis = _unbalanced(tmp_path / "c")
    # one trial count per participant: constant within every participant
    _maps_column(tmp_path / "c", "trials", lambda m: [str(20 + int(p[-2:])) for p in
                                                      m.participant_id])
    _model(analysis, 'mixed = true\nmap_covariates = ["trials"]\nrandom_slopes = ["trials"]')
    assert_refused(analysis, capsys, ["random_slopes", "'trials' does not vary within any "
                                      "participant"], out=tmp_path / "out")


def test_map_covariate_cells_that_are_missing_or_not_numbers(tmp_path, capsys):
    analysis = _unbalanced(tmp_path / "c")

    def cells(m):
        v = [str(30 + i % 5) for i in range(len(m))]
        v[2], v[5] = "n/a", "many"
        return v
    _maps_column(tmp_path / "c", "trials", cells)
    _model(analysis, 'mixed = true\nmap_covariates = ["trials"]')
    assert_refused(analysis, capsys, ["maps.tsv row 4 column 'trials'", "missing value",
                                      "maps.tsv row 7 column 'trials'", "'many' is not a number"],
                   out=tmp_path / "out")


def test_a_map_covariate_missing_from_the_table(tmp_path, capsys):
    analysis = _unbalanced(tmp_path / "c")
    _model(analysis, 'mixed = true\nmap_covariates = ["trails"]')
    assert_refused(analysis, capsys, ["column 'trails'", "missing from the maps table"],
                   out=tmp_path / "out")


def test_more_random_effect_parameters_than_the_maps_identify(tmp_path, capsys):
    # one map per condition: 2 maps per participant for an intercept and a slope each
    analysis = make_cohort(tmp_path / "c")
    _model(analysis, 'mixed = true\nrandom_slopes = ["condition"]')
    assert_refused(analysis, capsys, ["random_slopes", "more random-effect parameters than "
                                      "the data can identify", "8 participants x 2 random "
                                      "effects for 16 maps"], out=tmp_path / "out")


def test_no_participant_with_more_than_one_map(tmp_path, capsys):
    analysis = make_cohort(tmp_path / "c", conditions=("rare",))
    analysis.write_text(analysis.read_text().replace(
        '[[contrasts]]\nname = "rare_minus_frequent"\nwithin = { rare = 1, frequent = -1 }\n',
        "").replace(
        'name = "group_by_tone"\nwithin = { rare = 1, frequent = -1 }\n'
        'compare = { group = ["patient", "control"] }',
        'name = "group_by_tone"\ncompare = { group = ["patient", "control"] }'))
    _model(analysis, "mixed = true")
    assert_refused(analysis, capsys, ["no participant has more than one map"],
                   out=tmp_path / "out")


def test_an_empty_cell_for_a_whole_group(tmp_path, capsys):
    # no patient has a 'rare' map: the group x condition coefficient is not estimable
    analysis = _unbalanced(tmp_path / "c", drop=[(f"sub-0{i}", "rare", None)
                                                  for i in range(5, 9)])
    _model(analysis, "mixed = true")
    assert_refused(analysis, capsys, ["rank deficient", "group[T.patient]:condition[T.rare]"],
                   out=tmp_path / "out")


def test_unknown_random_slope_and_misplaced_contrast_models(tmp_path, capsys):
    analysis = _unbalanced(tmp_path / "c")
    _model(analysis, 'mixed = true\nrandom_slopes = ["conditon"]')
    body = analysis.read_text().replace('name = "age_slope"\nslope = "age"',
                                        'name = "age_slope"\nslope = "age"\nmodel = "linear"')
    analysis.write_text(body)
    assert_refused(analysis, capsys, ["'conditon' is neither the within column", "condition",
                                      "'linear' is not one of glm, mixed"],
                   out=tmp_path / "out")


def test_mixed_contrast_without_mixed_and_glm_slope_of_a_map_covariate(tmp_path, capsys):
    analysis = _unbalanced(tmp_path / "c")
    _maps_column(tmp_path / "c", "trials", lambda m: [str(30 + i % 7) for i in range(len(m))])
    body = analysis.read_text().replace('name = "age_slope"\nslope = "age"',
                                        'name = "age_slope"\nslope = "age"\nmodel = "mixed"')
    analysis.write_text(body)
    assert_refused(analysis, capsys, ["contrast 'age_slope' model", "needs mixed = true"],
                   out=tmp_path / "out")
    _model(analysis, 'mixed = true\nmap_covariates = ["trials"]')
    analysis.write_text(analysis.read_text().replace(
        'model = "mixed"', 'model = "glm"').replace('slope = "age"', 'slope = "trials"'))
    assert_refused(analysis, capsys, ["slope: 'trials' is a map covariate",
                                      "remove model = \"glm\""], out=tmp_path / "out")


# ----------------------------------------------------------------------------
# random_slopes = "auto" (the default) and the rearrangements check decides
# ----------------------------------------------------------------------------

def test_auto_random_slope_where_sessions_repeat_a_condition(tmp_path, capsys):
    """Two sessions of each condition: the condition effect's variance across participants
    is identified, so the default model has a random condition slope (Barr et al. 2013,
    J Mem Lang 68:255-278: the maximal structure the design justifies)."""
    analysis = _unbalanced(tmp_path / "c")
    _model(analysis, "mixed = true")
    rc, text = run_check(analysis, capsys)
    assert rc == 0, text
    assert "  random       : Intercept, condition[T.rare] per participant" in text
    assert "random slope of 'condition' (auto)" in text


def test_no_auto_random_slope_with_one_map_per_condition(tmp_path, capsys):
    analysis = make_cohort(tmp_path / "c")
    _model(analysis, "mixed = true")
    rc, text = run_check(analysis, capsys)
    assert rc == 0, text
    assert "  random       : Intercept per participant" in text
    assert ("no random slope of 'condition' (auto): no participant has two maps of one "
            "condition") in text
    assert "random_slopes = []" in text                  # how to say it explicitly
    # an explicit empty list is taken as it is, without the note
    _model(analysis, "random_slopes = []")
    rc, text = run_check(analysis, capsys)
    assert rc == 0 and "(auto)" not in text, text


def test_a_random_slopes_value_that_is_neither_auto_nor_a_list(tmp_path, capsys):
    analysis = make_cohort(tmp_path / "c")
    _model(analysis, 'mixed = true\nrandom_slopes = "yes"')
    assert_refused(analysis, capsys, ["[model] random_slopes", "must be \"auto\" or a list"],
                   out=tmp_path / "out")


def test_a_cohort_too_small_to_reach_alpha_is_refused(tmp_path, capsys):
    """2 vs 2 participants: 2^4 = 16 whole-participant sign flips at most, so no corrected
    p can fall below 1/16 > 0.05, two-sided 2/16 (all signs reversed mirror the observed
    statistic) (common practice: the smallest permutation p is one over the number of
    distinct rearrangements)."""
    analysis = make_cohort(tmp_path / "c", n_per_group=2, sessions=["1", "2"])
    _model(analysis, "mixed = true")
    assert_refused(analysis, capsys, ["contrast 'rare_minus_frequent'", "16 distinct",
                                      "0.125", "above alpha = 0.05", "could never reject",
                                      "contrast 'group_by_tone'", "more participants"],
                   out=tmp_path / "out")
    # FDR needs no rearrangement
    analysis.write_text(analysis.read_text().replace('correction = "cluster-mass"',
                                                     'correction = "fdr"'))
    rc, text = run_check(analysis, capsys)
    assert rc == 0, text


def test_check_says_when_sign_flips_replace_permutations(tmp_path, capsys):
    """sub-03 lacks 'frequent' and sub-05 a session: with the random slope their maps
    have other covariances than the rest, and the six others hold 3 + 3 of the groups:
    C(6, 3) = 20 group relabellings, fewer than the 50 resamples asked for."""
    analysis = _unbalanced(tmp_path / "c")
    _model(analysis, "mixed = true")
    rc, text = run_check(analysis, capsys)
    assert rc == 0, text
    assert ("note         : contrast 'group_by_tone': only 20 distinct relabelling(s) of the "
            "tested columns") in text
    assert "whole-participant sign flips are used" in text


def test_a_continuous_map_covariate_does_not_split_the_permutation_blocks(tmp_path):
    """Blocks are participants whose maps have the same random-effect rows: trials per map
    (every map its own value) leave them as they are."""
    from groupsrc.inputs.settings import parse_settings
    from groupsrc.pipeline import prepare
    analysis = _unbalanced(tmp_path / "c")
    _model(analysis, "mixed = true\nrandom_slopes = []")
    plain = prepare(parse_settings(analysis)).mixed.layout
    _maps_column(tmp_path / "c", "trials", lambda m: [str(20 + 3 * i) for i in range(len(m))])
    _model(analysis, 'map_covariates = ["trials"]')
    with_trials = prepare(parse_settings(analysis)).mixed.layout
    maps = pd.read_csv(tmp_path / "c" / "maps.tsv", sep="\t")             # pandas
    sizes = maps.participant_id.value_counts().sort_index().to_numpy()
    # intercept only: the blocks are the participants' numbers of maps
    assert len(np.unique(with_trials)) == len(np.unique(sizes)) == len(np.unique(plain))
    np.testing.assert_array_equal(with_trials, plain)
