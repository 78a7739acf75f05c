"""Figures (plot) and reports (export): the files they write, and the numbers behind the figures.

A small campaign is loaded through the real CLI into a real warehouse (SQLite, or PostgreSQL with
BLOCKYARD_TEST_URL): 3 treatments x 6 blocks x 2 instances x 2 seeds. One treatment's name holds
quotes, angle brackets, an ampersand and SQL-looking text, so every output must escape it.
"""
from __future__ import annotations

import base64
import csv
import hashlib
import io
import random
import re
import xml.etree.ElementTree as ET
from html import escape
from html.parser import HTMLParser
from pathlib import Path
from urllib.parse import unquote

import numpy as np
import pandas as pd
import pytest

from warehouse.errors import InputError
from warehouse.present import figures as F
from warehouse.present.pages import md

# The PNG signature: the first eight bytes of every PNG file (PNG specification, W3C / ISO/IEC 15948).
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
ODD = "<b>\"odd\" & 'x'); DROP TABLE runs;--</b>"
TREATMENTS = [("packer", "1.0", 0.0), ("packer", "2.0", -1.5), (ODD, "1.0", 0.8)]


def _write_campaign(path: Path) -> Path:
    rnd = random.Random(11)
    with path.open("w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["solver", "version", "family", "group", "instance", "seed", "status", "pallets"])
        for b in range(6):
            family, group = ("north", "south")[b % 2], f"g{b + 1}"
            for i in range(2):
                for name, version, effect in TREATMENTS:
                    for seed in (1, 2):
                        if name == "packer" and version == "1.0" and b == 2 and i == 1 and seed == 2:
                            w.writerow([name, version, family, group, f"{group}-i{i}", seed, "timeout", ""])
                            continue
                        value = 20 + 6 * b + 1.5 * i + effect + rnd.gauss(0, 0.4)
                        w.writerow([name, version, family, group, f"{group}-i{i}", seed, "ok", f"{value:.3f}"])
    return path


@pytest.fixture
def campaign(cli, tmp_path):
    src = _write_campaign(tmp_path / "runs-small.csv")
    res = cli("load", str(src), "--campaign", "c")
    assert res.code == 0, res
    return src


def _analysis(cli, *argv) -> int:
    res = cli(*argv, "--metric", "pallets", "--json")
    assert res.code == 0, res
    return res.json()["analysis_id"]


class Collector(HTMLParser):
    """Collects tags, checks that every non-void element is closed in order, and keeps the text."""

    VOID = {"meta", "img", "br", "hr", "link", "input"}

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.stack, self.errors, self.starts, self.text = [], [], [], []
        self.title, self.imgs, self.header_rows, self._in_title, self._row = "", [], [], False, None

    def handle_starttag(self, tag, attrs):
        self.starts.append(tag)
        if tag == "img":
            self.imgs.append(dict(attrs))
        if tag == "title":
            self._in_title = True
        if tag == "thead":
            self._row = []
        if tag not in self.VOID:
            self.stack.append(tag)

    def handle_endtag(self, tag):
        if not self.stack or self.stack[-1] != tag:
            self.errors.append(f"</{tag}> closes {self.stack[-1] if self.stack else 'nothing'}")
            return
        self.stack.pop()
        if tag == "title":
            self._in_title = False
        if tag == "thead":
            self.header_rows.append(self._row)
            self._row = None

    def handle_data(self, data):
        self.text.append(data)
        if self._in_title:
            self.title += data
        if self._row is not None and self.stack and self.stack[-1] == "th":
            self._row.append(data)


def _parse(text: str) -> Collector:
    p = Collector()
    p.feed(text)
    p.close()
    return p


def _png_ok(data: bytes) -> None:
    import matplotlib.image

    assert data.startswith(PNG_SIGNATURE)
    pixels = matplotlib.image.imread(io.BytesIO(data), format="png")
    assert pixels.ndim == 3 and pixels.shape[0] > 100 and pixels.shape[1] > 100


# --- export --------------------------------------------------------------------------------------

def test_export_html_is_balanced_escaped_and_embeds_readable_pngs(cli, campaign, tmp_path):
    aid = _analysis(cli, "blocktest")
    claim = 'packer 2.0 needs fewer pallets <than> 1.0 & "it holds"'
    kept = cli("keep", claim, "--analysis", str(aid), "--tag", "paper", "--tag", "q<4>")
    assert kept.code == 0, kept
    out = tmp_path / "report.html"
    res = cli("export", str(aid), "--to", str(out), "--json")
    assert res.code == 0, res
    doc = res.json()
    assert doc == {"analysis_id": aid, "file": str(out), "format": "html", "figures": 4}
    raw = out.read_text(encoding="utf-8")
    assert raw.startswith("<!DOCTYPE html>")
    p = _parse(raw)
    assert p.errors == [] and p.stack == []
    for tag in ("html", "head", "title", "style", "body", "table", "thead", "tbody", "figure", "figcaption", "dl", "ul"):
        assert tag in p.starts, tag
    assert not {"b", "script", "than"} & set(p.starts)  # data never becomes markup
    assert p.title == claim
    assert escape(claim) in raw and claim not in raw
    assert escape(ODD) in raw and ODD not in raw and "<b>" not in raw
    text = "".join(p.text)
    assert ODD in text and "q<4>" in text
    assert ["source of variation", "df", "sum of squares", "mean square", "F", "p"] in p.header_rows
    assert 'class="state state-fresh"' in raw
    # provenance: the loaded file's name and its sha256, computed here from the bytes
    assert "runs-small.csv" in text
    assert hashlib.sha256(campaign.read_bytes()).hexdigest() in text
    assert len(p.imgs) == doc["figures"]
    for img in p.imgs:
        head, _, payload = img["src"].partition(",")
        assert head == "data:image/png;base64"
        _png_ok(base64.b64decode(payload, validate=True))
        assert img["alt"]


def test_export_markdown_writes_every_file_it_links(cli, campaign, tmp_path):
    aid = _analysis(cli, "versus", "packer@1.0")
    out = tmp_path / "my report.md"
    res = cli("export", str(aid), "--to", str(out), "--json")
    assert res.code == 0, res
    doc = res.json()
    assert doc["format"] == "markdown" and doc["figures"] == 4
    text = out.read_text(encoding="utf-8")
    links = re.findall(r"!\[[^\]]*\]\(([^)]+)\)", text)
    assert len(links) == doc["figures"]
    for link in links:
        assert unquote(link).startswith("my report_files/")
        target = out.parent / unquote(link)
        assert target.is_file()
        _png_ok(target.read_bytes())
    assert "| treatment | diff | 95 % interval | change | p adj | wins / ties / losses | verdict |" in text
    assert "<b>" not in text and md(ODD) in text
    assert "state: FRESH" in text


def test_export_says_stale_after_a_retraction_and_tampered_after_an_edit(cli, wh, campaign, tmp_path):
    from sqlalchemy import update

    from warehouse.store import schema as S

    aid = _analysis(cli, "versus", "packer@1.0")
    res = cli("retract", "--slice", "packer@2.0", "--reason", "mis-built binary")
    assert res.code == 0, res
    stale = cli("export", str(aid), "--to", str(tmp_path / "stale.html"))
    assert stale.code == 0, stale
    assert stale.out.strip() == f"wrote report {tmp_path / 'stale.html'} (analysis {aid}, stale)"
    assert 'class="state state-stale"' in (tmp_path / "stale.html").read_text(encoding="utf-8")
    with wh.write() as conn:
        with conn.begin():
            conn.execute(update(S.analyses).where(S.analyses.c.id == aid).values(result=S.analyses.c.result + " "))
    res = cli("export", str(aid), "--to", str(tmp_path / "tampered.md"))
    assert res.code == 0, res
    assert "(analysis %d, tampered)" % aid in res.out
    assert "state: TAMPERED" in (tmp_path / "tampered.md").read_text(encoding="utf-8")


def test_unknown_analysis_or_format_is_one_line_and_exit_2(cli, campaign, tmp_path):
    for argv in (["export", "999", "--to", str(tmp_path / "r.html")],
                 ["export", "abc", "--to", str(tmp_path / "r.html")],
                 ["plot", "profile", "--analysis", "999", "--to", str(tmp_path / "p.png")]):
        res = cli(*argv)
        assert res.code == 2, res
        assert res.err.startswith("blockyard: ") and res.err.count("\n") == 1, res
    aid = _analysis(cli, "blocktest")
    res = cli("export", str(aid), "--to", str(tmp_path / "r.pdf"))
    assert res.code == 2 and ".html" in res.err and ".md" in res.err
    assert not (tmp_path / "r.pdf").exists()


# --- plot ----------------------------------------------------------------------------------------

def test_plot_writes_png_and_parsable_svg(cli, campaign, tmp_path):
    aid = _analysis(cli, "blocktest")
    png = tmp_path / "profile.png"
    res = cli("plot", "profile", "--analysis", str(aid), "--to", str(png), "--json")
    assert res.code == 0, res
    assert res.json() == {"figure": "profile", "file": str(png), "analysis_id": aid}
    _png_ok(png.read_bytes())
    svg = tmp_path / "qq.svg"
    res = cli("plot", "qq", "--metric", "pallets", "--to", str(svg), "--json")
    assert res.code == 0, res
    assert res.json()["analysis_id"] is None
    assert ET.parse(svg).getroot().tag.endswith("svg")
    res = cli("plot", "residuals", "--analysis", str(aid), "--to", str(tmp_path / "res.png"))
    assert res.code == 0 and res.out.startswith(f"wrote {tmp_path / 'res.png'}")
    res = cli("plot", "performance", "--analysis", str(aid), "--to", str(tmp_path / "perf.svg"))
    assert res.code == 0, res
    assert "recomputed on today's data" in res.out
    ET.parse(tmp_path / "perf.svg")
    assert not [f for f in tmp_path.iterdir() if f.name.startswith(".blockyard-")]  # no temporary file left


def test_plot_differences_needs_a_versus_and_draws_open_intervals(cli, campaign, tmp_path):
    bt = _analysis(cli, "blocktest")
    res = cli("plot", "differences", "--analysis", str(bt), "--to", str(tmp_path / "d.png"))
    assert res.code == 2 and "versus" in res.err and res.err.count("\n") == 1
    res = cli("plot", "differences", "--metric", "pallets", "--to", str(tmp_path / "d.png"))
    assert res.code == 2 and "versus" in res.err
    vs = _analysis(cli, "versus", "packer@1.0", "--better", "lower")
    svg = tmp_path / "d.svg"
    res = cli("plot", "differences", "--analysis", str(vs), "--to", str(svg))
    assert res.code == 0, res
    words = "".join(ET.parse(svg).getroot().itertext())
    assert ODD in words  # the odd name is kept as text and escaped into valid XML


def test_plot_refuses_an_unknown_extension(cli, campaign, tmp_path):
    res = cli("plot", "qq", "--metric", "pallets", "--to", str(tmp_path / "q.pdf"))
    assert res.code == 2 and ".png" in res.err and ".svg" in res.err
    assert not (tmp_path / "q.pdf").exists()


# --- the numbers behind the figures (no warehouse needed) ----------------------------------------

def test_performance_ratios_by_hand():
    # Dolan and More, Benchmarking optimization software with performance profiles, Math. Programming 91
    # (2002): r = t / min over solvers of t, and rho_s(1) is the share of problems on which s is best.
    cells = pd.DataFrame([
        ("A", "p1", 1.0), ("B", "p1", 2.0),
        ("A", "p2", 4.0), ("B", "p2", 2.0),
        ("A", "p3", 3.0), ("B", "p3", 3.0),
        ("A", "p4", 5.0),  # B has no value on p4: left out
    ], columns=["treatment", "instance", "value"])
    r = F.performance_ratios(cells, "min")
    assert list(r.index) == ["p1", "p2", "p3"] and list(r.columns) == ["A", "B"]
    assert r["A"].tolist() == [1.0, 2.0, 1.0] and r["B"].tolist() == [2.0, 1.0, 1.0]
    assert F.profile_share(r, 1.0).tolist() == pytest.approx([2 / 3, 2 / 3])
    assert F.profile_share(r, 1.999).tolist() == pytest.approx([2 / 3, 2 / 3])
    assert F.profile_share(r, 2.0).tolist() == [1.0, 1.0]
    taus, shares = F.profile_steps(r["A"])
    assert taus.tolist() == [1.0, 2.0] and shares.tolist() == pytest.approx([2 / 3, 1.0])
    # higher is better: the ratio is best / value, so the best is again 1
    up = F.performance_ratios(cells, "max")
    assert up["A"].tolist() == [2.0, 1.0, 1.0] and up["B"].tolist() == [1.0, 2.0, 1.0]
    # the drawn curve of A starts at rho_A(1) = 2/3
    fig = F.performance_profile(cells, "min", "seconds")
    first = fig.axes[0].get_lines()[0]
    assert first.get_ydata()[0] == pytest.approx(2 / 3)


def test_performance_ratios_refuse_values_that_are_not_positive():
    cells = pd.DataFrame([("A", "p1", 0.0), ("B", "p1", 2.0)], columns=["treatment", "instance", "value"])
    with pytest.raises(InputError, match="positive"):
        F.performance_ratios(cells, "min")


def test_block_profile_orders_blocks_by_their_mean():
    obs = pd.DataFrame([("A", "b1", 9.0), ("B", "b1", 11.0), ("A", "b2", 1.0), ("B", "b2", 3.0),
                        ("A", "b3", 5.0), ("B", "b3", 4.0)], columns=["treatment", "block", "value"])
    ax = F.block_profile(obs, "min", "pallets").axes[0]
    assert [t.get_text() for t in ax.get_xticklabels()] == ["b2", "b3", "b1"]
    assert "lower is better" in ax.get_title(loc="left")


def test_additive_residuals_match_least_squares_and_blom_positions():
    import statsmodels.formula.api as smf

    rnd = np.random.default_rng(3)
    rows = [(t, f"b{b}", 10 + 2 * b + (t == "B") - 0.5 * (t == "C") + rnd.normal(0, 0.3))
            for t in ("A", "B", "C") for b in range(5)]
    obs = pd.DataFrame(rows, columns=["treatment", "block", "value"])
    # The additive two-way model fitted by ordinary least squares (statsmodels) gives, on a complete
    # design, exactly y - block mean - treatment mean + grand mean (common practice).
    ref = smf.ols("value ~ C(treatment) + C(block)", data=obs).fit().resid.to_numpy()
    assert F.additive_fit(obs)["residual"].to_numpy() == pytest.approx(ref, abs=1e-10)
    holed = obs.drop(index=[4, 7]).reset_index(drop=True)
    ref = smf.ols("value ~ C(treatment) + C(block)", data=holed).fit().resid.to_numpy()
    assert F.additive_fit(holed)["residual"].to_numpy() == pytest.approx(ref, abs=1e-10)
    # Blom, Statistical Estimates and Transformed Beta-Variables (1958): positions (i - 3/8) / (n + 1/4);
    # for n = 4 these are 0.625/4.25, 1.625/4.25, 2.625/4.25, 3.625/4.25.
    assert F.blom_positions(4) == pytest.approx([0.1470588, 0.3823529, 0.6176471, 0.8529412], abs=1e-7)
    x, r = F.qq_points([0.3, -0.1, 0.2, -0.4])
    assert r.tolist() == [-0.4, -0.1, 0.2, 0.3]
    assert x[0] == pytest.approx(-x[-1]) and x[0] == pytest.approx(-1.0491, abs=1e-4)  # z at 0.1470588


def test_markdown_escaping_keeps_data_literal():
    assert md("a|b*c<d>&_e") == "a\\|b\\*c&lt;d&gt;&amp;\\_e"


def test_the_relative_block_profile_plots_percent_differences_from_the_baseline():
    # reference: the percentage difference computed by hand from the same table (common practice:
    # 100 * (value / reference - 1))
    import pandas as pd

    from warehouse.present.figures import relative_profile

    obs = pd.DataFrame({"treatment": ["a", "b", "a", "b", "a", "b"], "block": ["x", "x", "y", "y", "z", "z"],
                        "value": [200.0, 190.0, 2.0, 2.2, 0.0, 5.0]})
    fig = relative_profile(obs, "min", "pallets", ["a", "b"], baseline="a")
    ax = fig.axes[0]
    lines = {ln.get_label(): list(ln.get_ydata()) for ln in ax.get_lines() if not ln.get_label().startswith("_")}
    assert lines["a"] == [0.0, 0.0]
    assert sorted(lines["b"]) == pytest.approx(sorted([100 * (190 / 200 - 1), 100 * (2.2 / 2.0 - 1)]))
    assert any("1 blocks left out (reference zero or missing)" in t.get_text() for t in ax.texts)  # block z


def test_the_report_shows_failures_per_treatment_and_block(tmp_path):
    import subprocess
    import sys

    folder = tmp_path / "demo"
    done = subprocess.run([sys.executable, "-m", "warehouse", "demo", str(folder)], capture_output=True, text=True)
    assert done.returncode == 0, done.stderr[-2000:]
    out = tmp_path / "r.md"
    done = subprocess.run([sys.executable, "-m", "warehouse", "export", "1", "--to", str(out), "-w",
                           str(folder / "demo.db")], capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    text = out.read_text()
    assert "failed)" in text and "| failed runs |" in text
    assert "block profile, relative" in text
