"""Tests of assim.reporting: one self-contained HTML file with the caution, provenance, skill
and every figure embedded."""

from __future__ import annotations

import base64
import hashlib
import re
from html.parser import HTMLParser

import pytest
from test_verification import make_study  # the synthetic study shared by the product tests

import assim
import assim.plots as plots
import assim.reporting as report
import assim.verification as v
from assim import paths
from assim.caution import CAUTION


class _Collect(HTMLParser):
    def __init__(self):
        super().__init__()
        self.tags: list[tuple[str, dict]] = []
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))

    def handle_data(self, data):
        self.text.append(data)


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    cfg, truth = make_study(tmp_path_factory.mktemp("report"), days=100, members=8, leads=2)
    v.verify_results(cfg)
    cfg = type(cfg)(dict(cfg, outputs=dict(cfg["outputs"], figures=["birch"])))
    plots.plot_results(cfg)
    return cfg, truth


def test_report_is_self_contained_and_embeds_every_figure(study):
    """Common practice, no published source: the report parses (html.parser), embeds every
    PNG of the figures folder as a data: URI (byte for byte), carries the caution, the config
    digest, the version and the input files' SHA-256, and refers to no external URL."""
    cfg, _ = study
    path = report.write_report(cfg)
    assert path == paths.report(cfg)
    text = path.read_text(encoding="utf-8")
    parser = _Collect()
    parser.feed(text)
    parser.close()
    figures = sorted(paths.figures(cfg).glob("*.png"))
    assert len(figures) >= 6
    images = [a["src"] for t, a in parser.tags if t == "img"]
    assert len(images) == len(figures)
    assert all(src.startswith("data:image/png;base64,") for src in images)
    embedded = {base64.b64decode(src.split(",", 1)[1]) for src in images}
    assert embedded == {f.read_bytes() for f in figures}
    body = " ".join(" ".join(parser.text).split())
    assert CAUTION in body
    assert body.index(CAUTION) < body.index("Settings and provenance")  # the banner comes first
    assert cfg.digest() in text and assim.__version__ in text and str(cfg["ensemble"]["seed"]) in text
    obs = paths.prepared(cfg, "observations.nc")
    assert hashlib.sha256(obs.read_bytes()).hexdigest() in text
    assert not re.search(r"(https?:)?//[A-Za-z0-9.-]+\.[a-z]{2,}", text.replace("data:image/png;base64,", ""))
    assert all(a["href"].startswith("#") for _, a in parser.tags if "href" in a)
    assert all(a["src"].startswith("data:") for _, a in parser.tags if "src" in a)
    assert not {t for t, _ in parser.tags} & {"link", "script", "iframe"}
    assert "Birch River (birch)" in body and "brier_minor" in body


def test_report_summary_values_come_from_skill(study):
    """Common practice, no published source: the summary table shows the median over basins
    of skill.nc (checked for the assimilation CRPS at lead 1)."""
    cfg, _ = study
    skill = v.verify_results(cfg)
    value = float(skill["skill"].sel(experiment="assimilation", lead=1, metric="crps").median())
    text = report.render_report(cfg)
    row = re.search(r"crps \(m3 s-1\)</td><td class=\"l\">assimilation</td><td>[^<]*</td><td>([^<]*)</td>", text)
    assert row is not None and float(row.group(1)) == pytest.approx(value, rel=1e-2)


def test_report_without_products_says_what_is_missing(tmp_path):
    """Common practice, no published source: with no skill and no figures the report is
    still written, with the caution, and says which command produces what is missing."""
    cfg = assim.load_config(None, data={"prepared": str(tmp_path / "p"), "raw": str(tmp_path / "raw")},
                            results=str(tmp_path / "r"))
    text = report.write_report(cfg).read_text()
    assert CAUTION in text and "assim verify" in text and "assim plot" in text
    assert "<img" not in text
