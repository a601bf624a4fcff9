"""Every figure kind the report draws, checked for text that overlaps other text or
leaves the canvas, and for legends drawn over data.

Each PNG the output stage saves goes through a check (the save is wrapped): after
matplotlib has laid the figure out and drawn it, the window extents of every drawn
text (titles, labels, drawn tick labels, annotations, legend entries) must not
intersect one another and must lie inside the canvas, and no line of an axes may
pass through that axes' legend box.  A figure that breaks a rule raises in the
process that draws it, which fails the report build (figures drawn in forked
workers raise through their futures).  The geometry is matplotlib's own
(``Artist.get_window_extent`` with the figure's renderer; common practice).

The cohorts are the random ones of conftest.py and the surface fixtures; the test
requires that every kind of figure was drawn at least once, so a kind that stops
being drawn fails here instead of escaping the check.
"""

from __future__ import annotations

import re

import numpy as np
import pytest
from matplotlib.text import Text

from groupsrc.cli import main
from groupsrc.outputs import build_report, files

TOL = 0.5        # px: boxes that only touch do not overlap

#: every kind of figure (file stem without its cluster number) and where it is drawn
KINDS = {"projections_cluster", "sources_by_time_cluster", "timecourses", "null_distribution",
         "design", "fit_over_time", "surface_cluster", "volume_parts_cluster",
         "slices_cluster", "covariate_cluster", "conditions_by_group"}


def _drawn_texts(fig):
    ticks, out = set(), []
    for ax in fig.axes:
        for axis in (ax.xaxis, ax.yaxis):
            hidden = not (ax.axison and axis.get_visible() and ax.get_visible())
            lo, hi = sorted(axis.get_view_interval())
            span = (hi - lo) * 1e-9 + 1e-12
            for tick in axis.get_major_ticks() + axis.get_minor_ticks():
                for lab in (tick.label1, tick.label2):
                    ticks.add(id(lab))
                    if (not hidden and tick.get_visible() and lab.get_visible() and lab.get_text().strip()
                            and lo - span <= tick.get_loc() <= hi + span):
                        out.append(lab)
    for t in fig.findobj(Text):
        if id(t) in ticks or not t.get_visible() or not t.get_text().strip():
            continue
        if t.get_alpha() == 0:
            continue
        out.append(t)
    return out


def layout_problems(fig) -> list:
    """Overlapping texts, texts off the canvas, lines through legends."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from groupsrc.outputs.figures import DPI
    old_dpi = fig.dpi
    fig.set_dpi(DPI)                    # as the PNG was drawn
    canvas = FigureCanvasAgg(fig)
    canvas.draw()
    r = canvas.get_renderer()
    W, H = canvas.get_width_height()
    try:
        return _problems(fig, r, W, H)
    finally:
        fig.set_dpi(old_dpi)


def _problems(fig, r, W, H) -> list:
    texts = _drawn_texts(fig)
    boxes = [t.get_window_extent(r) for t in texts]
    problems = []
    for t, b in zip(texts, boxes):
        if b.x0 < -TOL or b.y0 < -TOL or b.x1 > W + TOL or b.y1 > H + TOL:
            problems.append(f"text {t.get_text()!r} leaves the canvas ({b.extents}, {W}x{H})")
    for i in range(len(texts)):
        for j in range(i + 1, len(texts)):
            a, b = boxes[i], boxes[j]
            if (min(a.x1, b.x1) - max(a.x0, b.x0) > TOL
                    and min(a.y1, b.y1) - max(a.y0, b.y0) > TOL):
                problems.append(f"texts overlap: {texts[i].get_text()!r} and "
                                f"{texts[j].get_text()!r}")
    for ax in fig.axes:
        leg = ax.get_legend()
        if leg is None:
            continue
        box = leg.get_window_extent(r)
        for line in ax.get_lines():
            xy = line.get_transform().transform(np.column_stack(line.get_data()).astype(float))
            xy = xy[np.all(np.isfinite(xy), axis=1)]
            if xy.size == 0:
                continue
            # sample the segments densely enough to catch a line that crosses the box
            dense = np.concatenate([np.linspace(a, b, 20) for a, b in zip(xy[:-1], xy[1:])]) \
                if len(xy) > 1 else xy
            inside = ((dense[:, 0] > box.x0 + TOL) & (dense[:, 0] < box.x1 - TOL)
                      & (dense[:, 1] > box.y0 + TOL) & (dense[:, 1] < box.y1 - TOL))
            if inside.any():
                problems.append(f"a line ({line.get_label()!r}) crosses the legend of "
                                f"axes {ax.get_title()!r}")
    return problems


DRAWN = []


@pytest.fixture
def checked(monkeypatch):
    original = files.save_figure

    def save_and_check(fig, path, **kwargs):
        out = original(fig, path, **kwargs)
        if str(path).endswith(".png"):
            problems = layout_problems(fig)
            if problems:
                raise AssertionError(f"{path}:\n  " + "\n  ".join(problems[:12]))
        return out

    monkeypatch.setattr(files, "save_figure", save_and_check)
    from groupsrc.outputs import figures
    monkeypatch.setattr(figures, "save_figure", save_and_check)
    return DRAWN


def _kinds(folder):
    return {re.sub(r"\d+$", "", p.stem) for p in folder.rglob("figures/*.png")}


def _first_contrast_only(analysis):
    """Keep the analysis file's first contrast (fewer figures to draw)."""
    text = analysis.read_text()
    head, rest = text.split("[[contrasts]]", 1)
    first, tail = rest.split("[[contrasts]]", 1) if "[[contrasts]]" in rest else (rest, "")
    inference = tail[tail.index("[inference]"):] if "[inference]" in tail else ""
    analysis.write_text(head + "[[contrasts]]" + first + inference)


def test_no_text_overlaps_in_any_figure_kind(checked, tmp_path_factory):
    from _outputs_fixture import results_folder
    from _surface_fixture import make_surface_cohort
    from _cifti_volume_fixture import make_volume_cohort
    from test_mixed_check import _model, _unbalanced

    kinds = set()
    # the synthetic volume results (t and F contrasts), redrawn under the check
    _, out = results_folder(tmp_path_factory)
    build_report(out)
    kinds |= _kinds(out)
    root = tmp_path_factory.mktemp("layout")
    # a volume cohort with the mixed model beside the GLM, every contrast kind
    analysis = _unbalanced(root / "mixed")
    # a random intercept only: with the default random slope nearly every fit of this
    # tiny noise cohort is a boundary fit, its df capped, and no point forms a cluster
    _model(analysis, "mixed = true\nrandom_slopes = []")
    body = analysis.read_text().replace("resamples = 50", "resamples = 20")
    body = body.replace('name = "age_slope"\n', 'name = "age_slope"\nmodel = "glm"\n')
    analysis.write_text(body)
    assert main(["run", str(analysis), "--out", str(root / "mixed_out"), "--quiet"]) == 0
    kinds |= _kinds(root / "mixed_out")
    # surfaces: GIfTI, and CIFTI-2 with a volume part carrying an effect
    analysis = make_surface_cohort(root / "surf")      # no correction: every cluster shown
    analysis.write_text(re.sub(r'correction = "[a-z-]+"', 'correction = "none"',
                               analysis.read_text()))
    _first_contrast_only(analysis)
    assert main(["run", str(analysis), "--out", str(root / "surf_out"), "--quiet"]) == 0
    kinds |= _kinds(root / "surf_out")
    analysis = make_volume_cohort(root / "parts", effect=4.0)
    _first_contrast_only(analysis)
    assert main(["run", str(analysis), "--out", str(root / "parts_out"), "--quiet"]) == 0
    kinds |= _kinds(root / "parts_out")
    missing = {k for k in KINDS if not any(x == k or x.startswith(k) for x in kinds)}
    assert not missing, f"figure kinds never drawn: {missing} (drawn: {sorted(kinds)})"
