"""Analysis-file values: `check` accepts nothing that `run` (or the engine) rejects.

Each case writes a broken analysis file beside a tiny cohort and asserts the
acceptance rule of the reliability work (exit 1, no traceback, the key named,
inputs unchanged; see ``test_check.assert_refused``).  The second half walks
the engine's own validations (``permutation.run_inference`` and the checks it
calls) so that a new engine check without a matching settings check is
noticed.
"""

import inspect
import math

import numpy as np
import pytest
from scipy import sparse

from conftest import copy_cohort
from groupsrc.stats import inference as permutation
from groupsrc.cli import main
from groupsrc.inputs.settings import SCHEMA, VALUE_RULES, read_settings
from test_check import assert_refused, run_check


def _set(analysis, section_line, text):
    """Add ``text`` right under ``section_line`` of the analysis file."""
    body = analysis.read_text()
    assert section_line in body
    analysis.write_text(body.replace(section_line, section_line + "\n" + text, 1))


def _inference(analysis, key, value):
    body = analysis.read_text()
    lines = [ln for ln in body.splitlines() if not ln.startswith(f"{key} =")]
    analysis.write_text("\n".join(lines) + "\n")
    _set(analysis, "[inference]", f"{key} = {value}")


@pytest.fixture
def cohort_copy(tiny_cohort, tmp_path):
    return copy_cohort(tiny_cohort, tmp_path / "broken")


# ---------------------------------------------------------------------------
# one test per case of the issue: check and run both refuse, naming the key
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("value", ["-1", "9223372036854775808"])
def test_seed_out_of_range_is_refused_by_check_and_run(cohort_copy, tmp_path, capsys, value):
    _inference(cohort_copy, "seed", value)
    assert_refused(cohort_copy, capsys, ["[inference] seed", value, "non-negative integer"],
                   out=tmp_path / "out")


@pytest.mark.parametrize("key,value", [("tfce_e", "0"), ("tfce_e", "-0.5"), ("tfce_h", "0.0"),
                                       ("tfce_h", "-2"), ("tfce_e", "nan"), ("tfce_h", "inf")])
def test_non_positive_tfce_exponent_is_refused(cohort_copy, tmp_path, capsys, key, value):
    _inference(cohort_copy, "correction", '"tfce"')
    _inference(cohort_copy, key, value)
    assert_refused(cohort_copy, capsys, [f"[inference] {key}", "positive number"],
                   out=tmp_path / "out")


@pytest.mark.parametrize("value", ["[0.1]", "[0.0, 0.01, 0.02]", '["0", "0.02"]', "[0.02, 0.0]",
                                   "[]", "[nan, 0.02]", '[0.0, "x"]'])
def test_malformed_time_window_is_refused(cohort_copy, tmp_path, capsys, value):
    _inference(cohort_copy, "time_window", value)
    assert_refused(cohort_copy, capsys, ["[inference] time_window", "[start, stop]"],
                   out=tmp_path / "out")


def test_time_window_outside_the_data_is_refused(cohort_copy, tmp_path, capsys):
    # the maps run from -8 to 24 ms (conftest); the window check itself lives in pipeline
    _inference(cohort_copy, "time_window", "[1.0, 2.0]")
    assert_refused(cohort_copy, capsys, ["time_window", "holds no sample"], out=tmp_path / "out")


@pytest.mark.parametrize("key,value", [("forming_p", "nan"), ("alpha", "1.0"),
                                       ("resamples", "0"), ("resamples", "1000000001"),
                                       ("tfce_steps", "3")])
def test_other_inference_values_are_refused(cohort_copy, tmp_path, capsys, key, value):
    _inference(cohort_copy, key, value)
    assert_refused(cohort_copy, capsys, [f"[inference] {key}"], out=tmp_path / "out")


@pytest.mark.parametrize("key,value", [("sampling_interval", "nan"), ("sampling_interval", "0"),
                                       ("time_start", "inf")])
def test_non_finite_time_override_is_refused(cohort_copy, tmp_path, capsys, key, value):
    _set(cohort_copy, "[cohort]", f"{key} = {value}")
    assert_refused(cohort_copy, capsys, [f"[cohort] {key}"], out=tmp_path / "out")


def test_mixed_true_is_refused(cohort_copy, tmp_path, capsys):
    # the mixed model is documented as not available in 0.1; check and run must say so
    _set(cohort_copy, "[model]", "mixed = true")
    assert_refused(cohort_copy, capsys,
                   ["[model] mixed", "mixed model is not available", "set mixed = false"],
                   out=tmp_path / "out")


def test_contrast_names_differing_by_case_are_refused(cohort_copy, tmp_path, capsys):
    body = cohort_copy.read_text().replace('name = "age_slope"', 'name = "Rare_Minus_Frequent"')
    cohort_copy.write_text(body)
    assert_refused(cohort_copy, capsys,
                   ["contrast 'Rare_Minus_Frequent'", "'rare_minus_frequent' only by upper/lower case",
                    "rename one"], out=tmp_path / "out")


def test_malformed_contrast_content_gives_problems_not_tracebacks(cohort_copy, capsys):
    body = cohort_copy.read_text()
    body = body.replace('within = { rare = 1, frequent = -1 }\n[[contrasts]]\nname = "group_by_tone"',
                        'within = { rare = "1", frequent = -1 }\n[[contrasts]]\nname = "group_by_tone"')
    body = body.replace('compare = { group = ["patient", "control"] }',
                        'compare = { group = ["patient", "control"], age = [1, 2] }')
    body += '[[contrasts]]\nname = "zero"\nwithin = { rare = 0, frequent = 0 }\n'
    body += '[[contrasts]]\nname = "flags"\ncompare = { group = [true, false] }\n'
    cohort_copy.write_text(body)
    assert_refused(cohort_copy, capsys,
                   ["contrast 'rare_minus_frequent' within", "rare = '1'",
                    "contrast 'group_by_tone' compare", "name exactly one factor",
                    "contrast 'zero' within", "all zero",
                    "contrast 'flags' compare.group", "at least two levels"])


# ---------------------------------------------------------------------------
# encodings of the analysis file
# ---------------------------------------------------------------------------

def test_latin1_analysis_file_is_refused(cohort_copy, tmp_path, capsys):
    text = cohort_copy.read_text().replace("tiny test cohort", "petite cohorte d'essai à Genève")
    cohort_copy.write_bytes(text.encode("latin-1"))
    assert_refused(cohort_copy, capsys, [str(cohort_copy), "line 1 is not valid UTF-8",
                                         "byte 0xE0", "save it as UTF-8"], out=tmp_path / "out")


@pytest.mark.parametrize("codec", ["utf-16", "utf-16-le"])
def test_utf16_analysis_file_is_refused(cohort_copy, tmp_path, capsys, codec):
    # "utf-16" writes a byte-order mark, "utf-16-le" does not
    cohort_copy.write_bytes(cohort_copy.read_text().encode(codec))
    assert_refused(cohort_copy, capsys, [str(cohort_copy), "UTF-16", "save it as UTF-8"],
                   out=tmp_path / "out")


def test_analysis_file_with_byte_order_mark_is_accepted(cohort_copy, capsys):
    cohort_copy.write_bytes(b"\xef\xbb\xbf" + cohort_copy.read_bytes())
    rc, text = run_check(cohort_copy, capsys)
    assert rc == 0, text


def test_analysis_file_that_is_a_folder(tmp_path, capsys):
    (tmp_path / "a.toml").mkdir()
    rc = main(["check", str(tmp_path / "a.toml")])
    text = capsys.readouterr().err
    assert rc == 1 and "is a folder" in text


# ---------------------------------------------------------------------------
# walking the engine's validations
# ---------------------------------------------------------------------------

#: Every parameter of the inference engine, and who guarantees a valid value.
#: A settings key means: the analysis file supplies it and settings.py checks it
#: (bad values in ENGINE_BAD below).  Anything else is supplied by code, not by
#: the user, and is named with the module that builds it.  A new engine
#: parameter fails test_every_engine_parameter_is_accounted_for until it is
#: placed here (and, if it comes from the analysis file, checked in settings).
ENGINE_PARAMETERS = {
    "correction": "correction", "n_resamples": "resamples", "seed": "seed",
    "forming_p": "forming_p", "tails": "tails", "alpha": "alpha",
    "tfce_e": "tfce_e", "tfce_h": "tfce_h", "tfce_steps": "tfce_steps",
    "Y": "code: cohort (NaN/Inf in maps are problems) + design.reduction_matrix",
    "X": "code: design.build_design (rank, df checked)",
    "contrast": "code: design.plan_contrast (estimability checked)",
    "scheme": "code: design.plan_contrast",
    "adjacency": "code: grid.adjacency from [inference] neighbors (a choice)",
    "blocks": "code: cohort (column exists, no missing values)",
    "nuisance": "code: default", "batch_size": "code: default", "n_jobs": "code: cli --workers",
    "progress": "code: cli", "tfce_dh": "code: default", "backend": "code: default",
}

#: Values the engine refuses, per settings key (TOML text, Python value).
ENGINE_BAD = {
    "correction": [('"clustermass"', "clustermass")],
    "tails": [('"both"', "both")],
    "resamples": [("0", 0), ("-5", -5)],
    "seed": [("-1", -1), ('"abc"', "abc"), ("1.5", 1.5)],
    "forming_p": [("0", 0.0), ("1", 1.0), ("1.5", 1.5), ("nan", math.nan)],
    "alpha": [("0.0", 0.0), ("1", 1.0), ("-0.05", -0.05)],
    "tfce_e": [("0", 0.0), ("-0.5", -0.5), ("nan", math.nan)],
    "tfce_h": [("0", 0.0), ("-2.0", -2.0), ("nan", math.nan)],
    "tfce_steps": [("0", 0), ("-1", -1)],
}

#: Boundary values settings accepts; the engine must accept them too.
ENGINE_GOOD = {"seed": [0, 2 ** 63 - 1], "resamples": [1, 64], "tfce_steps": [10],
               "forming_p": [1e-12, 0.999], "alpha": [1e-12, 0.999],
               "tfce_e": [1e-3], "tfce_h": [1e-3]}


def _engine(**overrides):
    """run_inference on a tiny array with one value changed."""
    rng = np.random.default_rng(0)
    Y = rng.standard_normal((6, 4, 3)).astype(np.float32)
    adjacency = sparse.diags([np.ones(3), np.ones(3)], [-1, 1], shape=(4, 4)).tocsr()
    kwargs = dict(scheme="sign-flip", correction="tfce" if any(k.startswith("tfce")
                                                               for k in overrides) else "max-stat",
                  n_resamples=8, seed=1)
    kwargs.update(overrides)
    return permutation.run_inference(Y, np.ones((6, 1)), np.ones(1), adjacency, **kwargs)


def _settings_problems(tmp_path, key, text):
    p = tmp_path / f"walk_{key}.toml"
    p.write_text('[cohort]\nparticipants = "p.tsv"\nmaps = "m.tsv"\n[model]\nwithin = "c"\n'
                 '[[contrasts]]\nname = "x"\nwithin = {a = 1, b = -1}\n'
                 f'[inference]\n{key} = {text}\n')
    return read_settings(p)[1].format()


def test_every_engine_parameter_is_accounted_for():
    params = set(inspect.signature(permutation.run_inference).parameters)
    assert params == set(ENGINE_PARAMETERS), (
        f"unclassified engine parameters: {sorted(params - set(ENGINE_PARAMETERS))}; "
        f"stale entries: {sorted(set(ENGINE_PARAMETERS) - params)}")
    for param, source in ENGINE_PARAMETERS.items():
        if not source.startswith("code:"):
            assert source in SCHEMA["inference"], f"{param} -> unknown settings key {source}"
            assert source in ENGINE_BAD, f"no bad value tried for [inference] {source}"


def test_every_value_rule_key_is_tried():
    # each [inference] value rule guards an engine parameter (time_window: pipeline.prepare)
    assert set(VALUE_RULES["inference"]) - {"time_window"} <= set(ENGINE_BAD)


@pytest.mark.parametrize("key,text,value",
                         [(k, t, v) for k, vals in ENGINE_BAD.items() for t, v in vals],
                         ids=lambda x: str(x))
def test_engine_refusal_is_caught_by_settings(tmp_path, key, text, value):
    param = next(p for p, s in ENGINE_PARAMETERS.items() if s == key)
    with pytest.raises((ValueError, TypeError)):
        _engine(**{param: value})
    problems = _settings_problems(tmp_path, key, text)
    assert f"[inference] {key}" in problems, problems


@pytest.mark.parametrize("key,value", [(k, v) for k, vals in ENGINE_GOOD.items() for v in vals],
                         ids=lambda x: str(x))
def test_values_settings_accept_the_engine_accepts(tmp_path, key, value):
    assert f"[inference] {key}" not in _settings_problems(tmp_path, key, repr(value))
    param = next(p for p, s in ENGINE_PARAMETERS.items() if s == key)
    _engine(**{param: value})


def test_within_contrast_naming_an_unknown_condition(cohort_copy, tmp_path, capsys):
    body = cohort_copy.read_text().replace("within = { rare = 1, frequent = -1 }\n[[contrasts]]\n"
                                           'name = "group_by_tone"',
                                           "within = { rare = 1, oddball = -1 }\n[[contrasts]]\n"
                                           'name = "group_by_tone"')
    cohort_copy.write_text(body)
    assert_refused(cohort_copy, capsys, ["contrast 'rare_minus_frequent' within",
                                         "condition 'oddball' does not occur in maps.tsv"],
                   out=tmp_path / "out")


@pytest.mark.parametrize("between,fragments", [
    ("scale(age) + group", ["contrast 'rare_minus_frequent'", "cannot be computed with the formula",
                            "scale() or center() are not needed"]),
    ("np.exp(age * 100) + group", ["[model] between", "gives NaN or infinite values in np.exp"]),
    ("age / 0", ["[model] between", "cannot be built"]),
])
def test_formula_the_design_cannot_use(cohort_copy, tmp_path, capsys, between, fragments):
    cohort_copy.write_text(cohort_copy.read_text().replace('between = "group + age"',
                                                           f'between = "{between}"'))
    text = assert_refused(cohort_copy, capsys, fragments, out=tmp_path / "out")
    assert "\x1b[" not in text   # no terminal colour codes from the formula library
