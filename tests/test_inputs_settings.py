"""Analysis-file values: `check` accepts nothing that `run` (or the engine) rejects.

Each case writes a broken analysis file beside a tiny cohort and asserts the
acceptance rule of the reliability work (exit 1, no traceback, the key named,
inputs unchanged; see ``test_check.assert_refused``).  The second half walks
the engine's own validations (``permutation.run_inference`` and the checks it
calls) so that a new engine check without a matching settings check is
noticed.
"""

import dataclasses
import inspect
import math

import numpy as np
import pytest
from scipy import sparse

from conftest import copy_cohort
from groupsrc.stats import inference as permutation
from groupsrc.cli import main
from groupsrc.inputs.settings import SCHEMA, read_settings
from groupsrc.stats.corrections.scorers import TfceOptions
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


def _tfce(analysis, key, value):
    """Set a key of the [inference.tfce] table (appended at the end of the file)."""
    body = analysis.read_text()
    if "[inference.tfce]" not in body:
        body += "\n[inference.tfce]\n"
    analysis.write_text(body.replace("[inference.tfce]\n", f"[inference.tfce]\n{key} = {value}\n", 1))


@pytest.mark.parametrize("key,value", [("extent_power", "0"), ("extent_power", "-0.5"),
                                       ("height_power", "0.0"), ("height_power", "-2"),
                                       ("extent_power", "nan"), ("height_power", "inf")])
def test_non_positive_tfce_exponent_is_refused(cohort_copy, tmp_path, capsys, key, value):
    _inference(cohort_copy, "correction", '"tfce"')
    _tfce(cohort_copy, key, value)
    assert_refused(cohort_copy, capsys, [f"[inference.tfce] {key}", "positive number"],
                   out=tmp_path / "out")


def test_too_few_tfce_steps_are_refused(cohort_copy, tmp_path, capsys):
    _tfce(cohort_copy, "steps", "3")
    assert_refused(cohort_copy, capsys, ["[inference.tfce] steps", "at least 10"],
                   out=tmp_path / "out")


def test_old_tfce_spellings_are_unknown_keys(cohort_copy, tmp_path, capsys):
    # the TFCE options are the [inference.tfce] table; other spellings are unknown keys
    _inference(cohort_copy, "tfce_steps", "100")
    assert_refused(cohort_copy, capsys, ["key 'tfce_steps'", "unknown key", "tfce"],
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
                                       ("resamples", "0"), ("resamples", "1000000001")])
def test_other_inference_values_are_refused(cohort_copy, tmp_path, capsys, key, value):
    _inference(cohort_copy, key, value)
    assert_refused(cohort_copy, capsys, [f"[inference] {key}"], out=tmp_path / "out")


@pytest.mark.parametrize("key,value", [("sampling_interval", "nan"), ("sampling_interval", "0"),
                                       ("time_start", "inf")])
def test_non_finite_time_override_is_refused(cohort_copy, tmp_path, capsys, key, value):
    _set(cohort_copy, "[cohort]", f"{key} = {value}")
    assert_refused(cohort_copy, capsys, [f"[cohort] {key}"], out=tmp_path / "out")


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

#: Every parameter of the inference engine, and who guarantees a valid value: the
#: fields of InferenceSpec, TfceOptions and Execution and the arguments of
#: run_inference.  A settings key ("section key") means: the analysis file supplies
#: it and settings.py checks it (bad values in ENGINE_BAD below).  Anything else is
#: supplied by code, not by the user, and is named with the module that builds it.
#: A new engine parameter fails test_every_engine_parameter_is_accounted_for until
#: it is placed here (and, if it comes from the analysis file, checked in settings).
ENGINE_PARAMETERS = {
    "correction": "inference correction", "n_resamples": "inference resamples",
    "seed": "inference seed", "forming_p": "inference forming_p", "tails": "inference tails",
    "alpha": "inference alpha", "extent_power": "inference.tfce extent_power",
    "height_power": "inference.tfce height_power", "steps": "inference.tfce steps",
    "tfce": "code: pipeline builds TfceOptions from [inference.tfce]",
    "Y": "code: cohort (NaN/Inf in maps are problems) + design.reduction_matrix",
    "X": "code: design.build_design (rank, df checked)",
    "contrast": "code: design.plan_contrast (estimability checked)",
    "scheme": "code: design.plan_contrast",
    "adjacency": "code: source space adjacency from [inference] neighbors (a choice)",
    "blocks": "code: cohort (column exists, no missing values)",
    "nuisance": "code: default", "batch_size": "code: default", "n_jobs": "code: cli --workers",
    "progress": "code: cli", "step": "code: default", "backend": "code: default",
    "scheduler": "code: cli --scheduler", "checkpoint": "code: cli --resume",
    "map_budget": "code: cli --memory",
    "options": "code: the fields above",
}

#: Values the engine refuses, per settings key (TOML text, Python value).
ENGINE_BAD = {
    "inference correction": [('"clustermass"', "clustermass")],
    "inference tails": [('"both"', "both")],
    "inference resamples": [("0", 0), ("-5", -5)],
    "inference seed": [("-1", -1), ('"abc"', "abc"), ("1.5", 1.5)],
    "inference forming_p": [("0", 0.0), ("1", 1.0), ("1.5", 1.5), ("nan", math.nan)],
    "inference alpha": [("0.0", 0.0), ("1", 1.0), ("-0.05", -0.05)],
    "inference.tfce extent_power": [("0", 0.0), ("-0.5", -0.5), ("nan", math.nan)],
    "inference.tfce height_power": [("0", 0.0), ("-2.0", -2.0), ("nan", math.nan)],
    "inference.tfce steps": [("0", 0), ("-1", -1)],
}

#: Boundary values settings accepts; the engine must accept them too.
ENGINE_GOOD = {"inference seed": [0, 2 ** 63 - 1], "inference resamples": [1, 64],
               "inference.tfce steps": [10], "inference forming_p": [1e-12, 0.999],
               "inference alpha": [1e-12, 0.999], "inference.tfce extent_power": [1e-3],
               "inference.tfce height_power": [1e-3]}

TFCE_FIELDS = {f.name for f in dataclasses.fields(TfceOptions)}


def _engine(**overrides):
    """run_inference on a tiny array with one value changed."""
    rng = np.random.default_rng(0)
    Y = rng.standard_normal((6, 4, 3)).astype(np.float32)
    adjacency = sparse.diags([np.ones(3), np.ones(3)], [-1, 1], shape=(4, 4)).tocsr()
    tfce = {k: overrides.pop(k) for k in list(overrides) if k in TFCE_FIELDS}
    kwargs = dict(scheme="sign-flip", correction="tfce" if tfce else "max-stat",
                  n_resamples=8, seed=1)
    kwargs.update(overrides)
    if tfce:
        kwargs["tfce"] = TfceOptions(**tfce)
    return permutation.run_inference(Y, np.ones((6, 1)), np.ones(1), adjacency, **kwargs)


def _settings_problems(tmp_path, source, text):
    section, key = source.split()
    p = tmp_path / f"walk_{key}.toml"
    p.write_text('[cohort]\nparticipants = "p.tsv"\nmaps = "m.tsv"\n[model]\nwithin = "c"\n'
                 '[[contrasts]]\nname = "x"\nwithin = {a = 1, b = -1}\n'
                 f'[{section}]\n{key} = {text}\n')
    return read_settings(p)[1].format()


def _engine_parameters():
    names = set(inspect.signature(permutation.run_inference).parameters)
    for cls in (permutation.InferenceSpec, permutation.Execution, TfceOptions):
        names |= {f.name for f in dataclasses.fields(cls)}
    return names


def test_every_engine_parameter_is_accounted_for():
    params = _engine_parameters()
    assert params == set(ENGINE_PARAMETERS), (
        f"unclassified engine parameters: {sorted(params - set(ENGINE_PARAMETERS))}; "
        f"stale entries: {sorted(set(ENGINE_PARAMETERS) - params)}")
    for param, source in ENGINE_PARAMETERS.items():
        if not source.startswith("code:"):
            section, key = source.split()
            assert key in SCHEMA[section], f"{param} -> unknown settings key {source}"
            assert source in ENGINE_BAD, f"no bad value tried for [{section}] {key}"


def test_every_value_rule_key_is_tried():
    # each checked [inference] key guards an engine parameter (time_window: pipeline.prepare;
    # variance_groups: design.variance_groups, a participants column or auto / none)
    checked = {f"{sec} {k}" for sec in ("inference", "inference.tfce")
               for k, spec in SCHEMA[sec].items()
               if spec.check is not None or spec.choices is not None}
    assert checked - {"inference time_window", "inference neighbors",
                      "inference variance_groups"} <= set(ENGINE_BAD)


@pytest.mark.parametrize("source,text,value",
                         [(k, t, v) for k, vals in ENGINE_BAD.items() for t, v in vals],
                         ids=lambda x: str(x))
def test_engine_refusal_is_caught_by_settings(tmp_path, source, text, value):
    param = next(p for p, s in ENGINE_PARAMETERS.items() if s == source)
    with pytest.raises((ValueError, TypeError)):
        _engine(**{param: value})
    problems = _settings_problems(tmp_path, source, text)
    section, key = source.split()
    assert f"[{section}] {key}" in problems, problems


@pytest.mark.parametrize("source,value",
                         [(k, v) for k, vals in ENGINE_GOOD.items() for v in vals],
                         ids=lambda x: str(x))
def test_values_settings_accept_the_engine_accepts(tmp_path, source, value):
    section, key = source.split()
    assert f"[{section}] {key}" not in _settings_problems(tmp_path, source, repr(value))
    param = next(p for p, s in ENGINE_PARAMETERS.items() if s == source)
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
