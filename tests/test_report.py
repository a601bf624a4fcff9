"""The HTML report, methods.md and run.json written by groupsrc.outputs.

PNG facts are from the PNG specification (signature bytes, IHDR chunk with
width and height as big-endian uint32 at bytes 16-24).  The report is also
rendered in headless Chromium when /usr/bin/chromium exists.
"""

from __future__ import annotations

import base64
import json
import re
import shutil
import struct
import subprocess
from pathlib import Path

import numpy as np
import pytest

from groupsrc.outputs import build_report
from _outputs_fixture import RUN_RECORD, results_folder

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"      # PNG specification, section 5.2
CHROMIUM = Path("/usr/bin/chromium")


@pytest.fixture(scope="module")
def written(tmp_path_factory):
    return results_folder(tmp_path_factory)


def png_size(data: bytes):
    assert data[:8] == PNG_SIGNATURE
    assert data[12:16] == b"IHDR"
    return struct.unpack(">II", data[16:24])


def test_report_is_self_contained(written):
    _, out = written
    page = (out / "report.html").read_text(encoding="utf-8")
    srcs = re.findall(r'\bsrc="([^"]*)"', page)
    hrefs = re.findall(r'\bhref=["\']([^"\']*)["\']', page)
    assert srcs, "the report should embed figures"
    assert all(s.startswith("data:image/png;base64,") for s in srcs)
    assert all(h.startswith("#") for h in hrefs)          # in-page links only
    assert "<link" not in page and "@import" not in page and "http://" not in page
    for s in srcs:
        w, h = png_size(base64.b64decode(s.split(",", 1)[1]))
        assert w > 100 and h > 100


def test_report_content(written):
    analysis, out = written
    page = (out / "report.html").read_text(encoding="utf-8")
    for c in analysis.contrasts:
        assert f"Contrast {c.name}" in page
    assert "control" in page and "patient" in page           # participants per group
    assert "Sassenhagen" in page and "not a diagnostic device" in page
    assert "blurred and biased by the inverse method" in page
    # the contrasts' significant-cluster tables as HTML: one bold row per cluster with
    # corrected p <= alpha (the fixture's p, computed with plain numpy)
    n_sig = sum(int((c.inference.clusters["p_corrected"] <= 0.05).sum())
                for c in analysis.contrasts)
    sections = page.split('<h3>Significant clusters</h3>')[1:]
    assert sum(s.split("</table>")[0].count('<tr class="sig"') for s in sections) == 0
    assert sum(s.split("</table>")[0].count("<tr") - 1 for s in sections) == n_sig


def test_figures_have_png_and_svg_at_print_size(written):
    _, out = written
    pngs = sorted(out.rglob("figures/*.png"))
    kinds = {re.sub(r"\d+$", "", p.stem) for p in pngs}
    assert {"projections_cluster", "sources_by_time_cluster", "timecourses", "null_distribution",
            "design"} <= kinds
    for p in pngs:
        svg = p.with_suffix(".svg")
        assert svg.exists() and svg.read_text()[:200].lstrip().startswith("<?xml")
    # 180 mm at 150 dpi = 180 / 25.4 * 150 = 1063 px wide (bbox not trimmed)
    w, _ = png_size((out / "deviant_minus_standard" / "figures" / "projections_cluster01.png").read_bytes())
    assert abs(w - 180 / 25.4 * 150) <= 2


def test_methods_paragraph_from_this_run(written):
    analysis, out = written
    md = (out / "methods.md").read_text(encoding="utf-8")
    inf = analysis.settings["inference"]
    assert "12 participants (6 control and 6 patient)" in md
    assert f"{inf['resamples']} random rearrangements" in md
    assert f"seed {inf['seed']}" in md
    assert f"p = {inf['forming_p']}" in md
    assert "50 to 200 ms" in md
    # references of the methods used, and only those
    assert "Maris" in md and "164:177-190" in md
    assert "Phipson" in md and "Winkler" in md and "Hedges LV (1981)" in md
    assert "Threshold-free" not in md and "Benjamini" not in md


def test_run_record_kept_and_completed(written):
    _, out = written
    rec = json.loads((out / "run.json").read_text())
    for k, v in RUN_RECORD.items():
        assert rec[k] == v
    import numpy
    assert rec["libraries"]["numpy"] == numpy.__version__
    assert {"python", "system"} <= set(rec["platform"])
    for f in rec["output_files"]:
        assert (out / f).exists(), f
    assert "deviant_minus_standard/statistic.nii.gz" in rec["output_files"]


def test_build_report_rebuilds_from_the_folder(written, tmp_path):
    _, out = written
    copy = tmp_path / "copy"
    shutil.copytree(out, copy)
    before = sorted(p.relative_to(copy) for p in copy.rglob("figures/*"))
    for p in list(copy.rglob("figures/*")) + [copy / "report.html", copy / "methods.md"]:
        p.unlink()
    path = build_report(copy)
    assert path == copy / "report.html" and path.exists()
    assert sorted(p.relative_to(copy) for p in copy.rglob("figures/*")) == before
    assert (copy / "methods.md").read_text() == (out / "methods.md").read_text()
    assert not list(copy.rglob(".*part")) and not list(copy.rglob(".*.tmp*"))


def _chromium(args, tmp_path, timeout=90):
    flags = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
             "--disable-background-networking", "--disable-component-update", "--disable-sync",
             f"--user-data-dir={tmp_path / 'profile'}"]
    return subprocess.run([str(CHROMIUM), *flags, *args], capture_output=True, text=True,
                          timeout=timeout)


def test_report_renders_in_headless_chromium(written, tmp_path):
    if not CHROMIUM.exists():
        print("skipping: /usr/bin/chromium not found")
        pytest.skip("headless Chromium not installed (/usr/bin/chromium)")
    _, out = written
    # a copy with a small script that writes the images' decoded widths into the title
    page = (out / "report.html").read_text(encoding="utf-8")
    probe = ("<script>window.addEventListener('load',function(){var w=[];"
             "document.querySelectorAll('img').forEach(function(i){w.push(i.naturalWidth)});"
             "document.title='WIDTHS:'+w.join(',');});</script></body>")
    probed = tmp_path / "probe.html"
    probed.write_text(page.replace("</body>", probe), encoding="utf-8")
    dom = _chromium(["--virtual-time-budget=5000", "--dump-dom", probed.as_uri()], tmp_path)
    m = re.search(r"<title>WIDTHS:([\d,]*)</title>", dom.stdout)
    assert m, dom.stderr[-2000:]
    widths = [int(x) for x in m.group(1).split(",") if x]
    assert len(widths) == page.count("<img") and all(w > 0 for w in widths)
    shot = tmp_path / "shot.png"
    _chromium([f"--screenshot={shot}", "--window-size=1280,2000", "--hide-scrollbars",
               (out / "report.html").as_uri()], tmp_path)
    assert shot.exists(), "Chromium wrote no screenshot"
    import matplotlib.image as mpimg
    img = mpimg.imread(str(shot))
    assert img.shape[0] >= 1000 and img.shape[1] >= 1000
    assert float(np.var(img[..., :3])) > 1e-3           # not a blank page


def test_dataset_description_marks_a_bids_derivative(written):
    """BIDS specification, "Derivatives" (field names from memory): a derived dataset's
    dataset_description.json has Name, BIDSVersion, DatasetType "derivative" and
    GeneratedBy, a list of objects with at least Name (here also Version)."""
    analysis, out = written
    desc = json.loads((out / "dataset_description.json").read_text())
    assert desc["DatasetType"] == "derivative"
    assert desc["Name"] == analysis.title
    assert re.fullmatch(r"\d+\.\d+\.\d+", desc["BIDSVersion"])
    gen = desc["GeneratedBy"]
    assert isinstance(gen, list) and gen[0]["Name"] == "groupsrc"
    import groupsrc
    assert gen[0]["Version"] == groupsrc.__version__
    assert "dataset_description.json" in json.loads((out / "run.json").read_text())["output_files"]


def test_report_escapes_what_the_user_wrote(tmp_path):
    """Text from the analysis file reaches the page as text, never as markup
    (HTML standard: '<' and '&' in text content are written as character references)."""
    from _outputs_fixture import make_analysis
    from groupsrc.outputs import write_results
    analysis = make_analysis(with_atlas=False)
    analysis.title = "Tones <script>alert(1)</script> & more"
    analysis.contrasts[0].description = "rare > frequent <b>bold?</b>"
    write_results(analysis, tmp_path, dict(RUN_RECORD))
    page = (tmp_path / "report.html").read_text(encoding="utf-8")
    assert "<script>alert(1)</script>" not in page and "<b>bold?</b>" not in page
    assert "Tones &lt;script&gt;alert(1)&lt;/script&gt; &amp; more" in page
    assert "rare &gt; frequent &lt;b&gt;bold?&lt;/b&gt;" in page


def test_design_figure_explains_a_covariate_mean_weight():
    """A contrast read at the covariate's mean carries that mean as the weight on the
    covariate's coefficient (the prediction at x = mean includes mean x slope; common
    practice for estimated marginal means); the figure says so, and only then."""
    import pandas as pd
    from groupsrc.outputs.design_figure import weight_notes
    age = np.array([20.0, 35, 41, 58, 66, 70])
    X = pd.DataFrame({"Intercept": 1.0, "group[T.b]": [0.0, 1, 0, 1, 0, 1], "age": age})
    notes = weight_notes(X, [1.0, 0.5, age.mean()])
    assert len(notes) == 1 and "'age'" in notes[0] and f"{age.mean():.4g}" in notes[0]
    assert weight_notes(X, [0.0, 1.0, 0.0]) == []
    assert weight_notes(X, [[0, 1.0, 0], [0, 0, 1.0]]) == []


@pytest.mark.parametrize("what", ["observed clusters", "observed maximum"])
def test_null_figure_names_what_the_orange_lines_are(what, tmp_path, monkeypatch):
    # a TFCE or max-stat null figure marks the observed maximum, not clusters; each line
    # is named with its value in the legend below the axes, never as a label on the bars
    from groupsrc.outputs import cluster_figures
    seen = {}
    monkeypatch.setattr(cluster_figures, "save",
                        lambda fig, base: seen.setdefault("fig", fig) and [])
    null = np.random.default_rng(0).gamma(4.0, 25.0, 200)
    cluster_figures.null_figure(null, [("observed maximum", 830.0)], None, 0.05,
                                "largest |TFCE|", "t", tmp_path / "n", what=what)
    fig = seen["fig"]
    texts = [t.get_text() for t in fig.legends[0].get_texts()]
    assert "observed maximum: 830" in texts
    assert not fig.axes[0].texts and fig.axes[0].get_legend() is None
