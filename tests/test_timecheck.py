"""The time axis checked for an event-related response, and the window analysed printed
(inputs/timecheck.py).

Header values are written and read back with nibabel (the NIfTI-1 standard: pixdim[4]
is the sampling interval and toffset the first sample, in the time unit of
xyzt_units); the plausible range of sampling intervals (10 Hz to 100 kHz) is common
practice for event-related responses.  Broken copies of the tiny cohort must exit 1,
naming where the value came from, with every input unchanged (test_check.assert_refused).
"""

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from conftest import AFFINE, copy_cohort
from groupsrc.cli import main
from test_check import assert_refused


@pytest.fixture
def cohort_copy(tiny_cohort, tmp_path):
    return copy_cohort(tiny_cohort, tmp_path / "broken")


def _set(analysis, section, text):
    body = analysis.read_text()
    assert section in body
    analysis.write_text(body.replace(section, section + "\n" + text, 1))


def _strip_time_axes(analysis):
    """Every map re-saved as a program that knows no time axis saves it: pixdim[4] = 1
    and no time unit (nibabel's defaults for a new image)."""
    root = analysis.parent
    for rel in pd.read_csv(root / "maps.tsv", sep="\t")["path"]:
        img = nib.load(str(root / rel))
        data = np.asarray(img.dataobj)
        fresh = nib.Nifti1Image(data, AFFINE)
        assert fresh.header.get_zooms()[3] == 1.0 and fresh.header.get_xyzt_units()[1] == "unknown"
        nib.save(fresh, str(root / rel))


def _check(analysis, capsys):
    rc = main(["check", str(analysis)])
    cap = capsys.readouterr()
    return rc, cap.out + cap.err


def test_maps_without_a_time_axis_are_refused(cohort_copy, tmp_path, capsys):
    _strip_time_axes(cohort_copy)
    _set(cohort_copy, "[inference]", "time_window = [0.0, 0.6]")      # as the templates
    text = assert_refused(cohort_copy, capsys, ["[cohort]", "sampling interval 1000 ms (1 Hz)",
                                                "implausible", "pixdim[4]",
                                                "sampling_interval = 0.004"],
                          out=tmp_path / "out")
    assert "Traceback" not in text


def test_an_interval_stated_in_milliseconds_is_refused(cohort_copy, tmp_path, capsys):
    _set(cohort_copy, "[cohort]", "sampling_interval = 4")
    assert_refused(cohort_copy, capsys, ["[cohort] sampling_interval", "4000 ms",
                                         "in seconds: 4 ms is sampling_interval = 0.004"],
                   out=tmp_path / "out")


def test_a_first_sample_in_milliseconds_is_refused(cohort_copy, tmp_path, capsys):
    _set(cohort_copy, "[cohort]", "time_start = -100")
    assert_refused(cohort_copy, capsys, ["[cohort] time_start", "first sample at -100 s",
                                         "-100 ms is time_start = -0.1"], out=tmp_path / "out")


def test_a_window_of_two_samples_is_refused(cohort_copy, tmp_path, capsys):
    # conftest: samples every 4 ms from -8 ms; [0, 0.005] s holds 0 and 4 ms
    _set(cohort_copy, "[inference]", "time_window = [0.0, 0.005]")
    assert_refused(cohort_copy, capsys, ["[inference] time_window", "holds 2 samples",
                                         "0 ms, 4 ms", "at least 3"], out=tmp_path / "out")


def _axis(analysis):
    """(times in ms) of the first map, read by nibabel (seconds as xyzt_units says)."""
    root = analysis.parent
    rel = pd.read_csv(root / "maps.tsv", sep="\t")["path"][0]
    hdr = nib.load(str(root / rel)).header
    assert hdr.get_xyzt_units()[1] == "sec"
    n, dt, t0 = hdr.get_data_shape()[3], float(hdr["pixdim"][4]), float(hdr["toffset"])
    return (t0 + dt * np.arange(n)) * 1e3


def test_a_window_beyond_the_data_is_said_and_the_window_analysed_printed(cohort_copy, capsys):
    t = _axis(cohort_copy)
    _set(cohort_copy, "[inference]", "time_window = [0.0, 0.1]")
    rc, text = _check(cohort_copy, capsys)
    assert rc == 0, text
    inside = t[(t >= 0) & (t <= 100)]
    line = (f"  window       : {inside[0]:g} to {inside[-1]:g} ms, {inside.size} samples "
            "analysed (time_window [0, 0.1] s)")
    assert line in text.splitlines(), text
    assert "reaches beyond the maps' samples" in text, text


def test_a_window_inside_the_data_gives_no_note(cohort_copy, capsys):
    t = _axis(cohort_copy)
    _set(cohort_copy, "[inference]", f"time_window = [{t[1] / 1e3}, {t[-2] / 1e3}]")
    rc, text = _check(cohort_copy, capsys)
    assert rc == 0, text
    assert f"{t[1]:g} to {t[-2]:g} ms, {t.size - 2} samples analysed" in text, text
    assert "note" not in text


def test_all_samples_are_analysed_without_a_window(tiny_cohort, capsys):
    t = _axis(tiny_cohort)
    rc, text = _check(tiny_cohort, capsys)
    assert rc == 0, text
    assert (f"  window       : {t[0]:g} to {t[-1]:g} ms, {t.size} samples analysed "
            "(all samples)") in text.splitlines(), text


def test_run_says_the_window_it_analyses(tiny_cohort, tmp_path, capsys):
    t = _axis(tiny_cohort)
    assert main(["run", str(tiny_cohort), "--out", str(tmp_path / "res"),
                 "--resamples", "20"]) == 0
    err = capsys.readouterr().err
    assert f"analysing {t[0]:g} to {t[-1]:g} ms, {t.size} samples" in err, err


def test_maps_of_one_sample_need_no_interval(cohort_copy, capsys):
    """One sample per map (a response at one latency): the interval is never used, so the
    header's default of 1 s is not a problem."""
    root = cohort_copy.parent
    for rel in pd.read_csv(root / "maps.tsv", sep="\t")["path"]:
        img = nib.load(str(root / rel))
        one = nib.Nifti1Image(np.asarray(img.dataobj)[..., :1], AFFINE)
        nib.save(one, str(root / rel))
    rc, text = _check(cohort_copy, capsys)
    assert rc == 0, text
    assert "samples      : 1, 0 to 0 ms" in text, text
