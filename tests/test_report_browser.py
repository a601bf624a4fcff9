"""The map browser inside report.html, driven in headless Chromium.

A copy of the page gets a small probe script (the page itself is unchanged) that,
once the page has loaded: fingerprints the pixels of every browser canvas, moves the
time slider and fingerprints them again, clicks a cluster row of another contrast and
reads where the browser went (its ``data-state``: contrast, sample, source).  The
expected place is the cluster's peak as the report's data give it (contrast index,
sample, source), and the pixels must change at each step.  Chromium is Debian's
(``.ci/run`` installs it when it can); the tests skip, saying why, without it.
"""

from __future__ import annotations

import json
import re
import shutil
import subprocess
from pathlib import Path

import pytest

from _outputs_fixture import results_folder

CHROMIUM = Path("/usr/bin/chromium")

PROBE = r"""<script>
window.addEventListener('load', function () {
  function print() {
    var h = 0;
    document.querySelectorAll('#mb-views canvas').forEach(function (c) {
      var d = c.getContext('2d').getImageData(0, 0, c.width, c.height).data;
      for (var i = 0; i < d.length; i += 4) { h = (h * 31 + d[i] + 7 * d[i + 1] + 13 * d[i + 2]) % 1000000007; }
    });
    return h;
  }
  var out = {};
  var data = JSON.parse(document.getElementById('mb-data').textContent);
  var mb = document.getElementById('mb');
  out.start = mb.getAttribute('data-state');
  out.print0 = print();
  var slider = document.getElementById('mb-time');
  var t = Number(slider.value);
  slider.value = String(t === 0 ? Number(slider.max) : 0);
  slider.dispatchEvent(new Event('input'));
  out.afterSlider = mb.getAttribute('data-state');
  out.print1 = print();
  var rows = document.querySelectorAll('tr.mb-link');
  out.links = rows.length;
  var target = null;
  rows.forEach(function (r) {
    var owner = r.closest('[data-contrast]').getAttribute('data-contrast');
    if (target === null && owner !== data.contrasts[0].name) { target = r; }
  });
  if (target === null && rows.length) { target = rows[rows.length - 1]; }
  if (target) {
    out.clicked = [target.closest('[data-contrast]').getAttribute('data-contrast'),
                   target.getAttribute('data-cluster')];
    target.click();
    out.afterClick = mb.getAttribute('data-state');
    out.print2 = print();
  }
  out.expected = data.contrasts.map(function (c) {
    return [c.name, c.clusters.map(function (r) { return [r.cluster, r.t, r.source]; })];
  });
  document.title = 'PROBE:' + JSON.stringify(out);
});
</script></body>"""


def _drive(page: Path, tmp_path) -> dict:
    if not CHROMIUM.exists():
        print("skipping: /usr/bin/chromium not found")
        pytest.skip("headless Chromium not installed (/usr/bin/chromium); .ci/run installs it")
    html = page.read_text(encoding="utf-8")
    probed = tmp_path / "probe.html"
    probed.write_text(html.replace("</body>", PROBE), encoding="utf-8")
    flags = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
             "--disable-background-networking", "--disable-component-update", "--disable-sync",
             f"--user-data-dir={tmp_path / 'profile'}", "--window-size=1280,1600",
             "--virtual-time-budget=8000", "--dump-dom", probed.as_uri()]
    run = subprocess.run([str(CHROMIUM), *flags], capture_output=True, text=True, timeout=180)
    m = re.search(r"<title>PROBE:(.*?)</title>", run.stdout, flags=re.S)
    assert m, run.stderr[-3000:]
    return json.loads(m.group(1).replace("&quot;", '"').replace("&amp;", "&"))


def _check(out):
    assert out["print0"] != out["print1"], "moving the time slider changed no pixel"
    c0, t0, s0 = (int(x) for x in out["start"].split(","))
    c1, t1, s1 = (int(x) for x in out["afterSlider"].split(","))
    assert c1 == c0 and t1 != t0 and s1 == s0
    assert out["links"] >= 1 and "clicked" in out
    name, cluster = out["clicked"]
    names = [n for n, _ in out["expected"]]
    c, t, s = (int(x) for x in out["afterClick"].split(","))
    assert names[c] == name
    rows = dict(out["expected"])[name]
    peak = [r for r in rows if str(r[0]) == str(cluster)][0]
    assert (t, s) == (peak[1], peak[2])
    assert out["print2"] != out["print1"]


def test_volume_browser_moves_with_the_slider_and_the_cluster_rows(tmp_path_factory, tmp_path):
    _, out = results_folder(tmp_path_factory)
    page = out / "report.html"
    assert 'id="mb-data"' in page.read_text(encoding="utf-8")
    result = _drive(page, tmp_path)
    _check(result)


def test_surface_browser_moves_with_the_slider_and_the_cluster_rows(tmp_path):
    from _surface_fixture import make_surface_cohort
    from groupsrc.cli import main
    analysis = make_surface_cohort(tmp_path / "c")
    text = analysis.read_text().replace('correction = "cluster-mass"', 'correction = "none"')
    analysis.write_text(text)
    out = tmp_path / "out"
    assert main(["run", str(analysis), "--out", str(out), "--quiet"]) == 0
    result = _drive(out / "report.html", tmp_path)
    _check(result)


def test_the_page_needs_no_network(tmp_path_factory):
    _, out = results_folder(tmp_path_factory)
    page = (out / "report.html").read_text(encoding="utf-8")
    script = page.split('<script>', 1)[1] if "<script>" in page else ""
    for word in ("http://", "https://", "fetch(", "XMLHttpRequest", "import(", "<link"):
        assert word not in script and word not in page.split("<body>")[0]
    assert shutil.which("true")            # (keeps the import used on every platform)
