"""The report read as a reviewer reads it: findings first, significance marked in the
tables, column meanings on the page, intervals only where they may be read.

The expected clusters come from the synthetic fixture (_outputs_fixture.py), whose
clusters and corrected p are computed with scipy.ndimage and numpy independently of
groupsrc; the significance rule p <= alpha is the definition of a level-alpha test
(common practice).
"""

from __future__ import annotations

import re

import pandas as pd
import pytest

from _outputs_fixture import ALPHA, results_folder


@pytest.fixture(scope="module")
def written(tmp_path_factory):
    return results_folder(tmp_path_factory)


def _glance(page):
    return page.split('<h2 id="glance">')[1].split("</table>")[0]


def test_results_at_a_glance_comes_first(written):
    _, out = written
    page = (out / "report.html").read_text(encoding="utf-8")
    headings = re.findall(r'<h2 id="([^"]+)"', page)
    assert headings[0] == "glance"


def test_glance_lists_every_significant_cluster_and_only_those(written):
    analysis, out = written
    g = _glance((out / "report.html").read_text(encoding="utf-8"))
    rows = re.findall(r'<tr class="sig[^"]*"[^>]*>(.*?)</tr>', g, flags=re.S)
    expected = []
    for c in analysis.contrasts:
        t = c.inference.clusters
        expected += [(c.name, str(k)) for k, p in zip(t["cluster"], t["p_corrected"])
                     if p <= ALPHA]
    got = [tuple(re.findall(r"<td[^>]*>(.*?)</td>", r)[:2]) for r in rows]
    assert got == expected and expected
    # cluster-level p, never paired with a time as one cell
    assert "cluster-level p" in g


def test_significant_column_in_the_tables(written):
    analysis, out = written
    all_clusters = pd.read_csv(out / "clusters.tsv", sep="\t")
    for c in analysis.contrasts:
        t = pd.read_csv(out / c.name / "clusters.tsv", sep="\t")
        assert list(t["significant"]) == ["yes" if p <= ALPHA else "no"
                                          for p in t["p_corrected"]]
    assert "significant" in all_clusters.columns


def test_tables_wrap_and_show_what_their_columns_mean(written):
    _, out = written
    page = (out / "report.html").read_text(encoding="utf-8")
    css = page.split("<style>")[1].split("</style>")[0]
    assert "overflow-x:auto" not in css.split("pre{")[0]      # tables do not scroll sideways
    assert "nowrap" not in re.search(r"th,td\{[^}]*\}", css).group(0)
    # every table of clusters is followed by a visible legend of its columns
    assert page.count('<dl class="legend">') >= 1 + len(re.findall(
        r"<h3>Significant clusters</h3>\s*<table", page))
    assert "<dt>cluster-level p</dt><dd>family-wise corrected p" in page


def test_intervals_of_non_significant_clusters_are_left_out(written):
    analysis, out = written
    page = (out / "report.html").read_text(encoding="utf-8")
    for c in analysis.contrasts:
        t = c.inference.clusters
        sec = page.split(f'id="c-{c.name}"')[1].split("<h2")[0]
        full = sec.split('<details class="more">')[1].split("</table>")[0]
        for k, p in zip(t["cluster"], t["p_corrected"]):
            row = re.search(rf'<tr[^>]*data-cluster="{k}">(.*?)</tr>', full, flags=re.S)
            if row is None:
                continue
            cells = re.findall(r"<td[^>]*>(.*?)</td>", row.group(1))
            has_ci = any("[" in x for x in cells)
            assert has_ci == bool(p <= ALPHA), (c.name, k, cells)
