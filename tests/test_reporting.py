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


def test_report_names_the_hindcast_forcing(study):
    """Common practice, no published source: the skill section says which forcing the
    hindcast skill used and, when the operational forecast uses another, that its skill is
    not measured here; when they agree, it says so."""
    cfg, _ = study
    skill = v.verify_results(cfg)
    assert skill.attrs["hindcast_forcing"] == "unknown"  # the synthetic hindcast records none
    skill.attrs["hindcast_forcing"] = "observed"
    text = " ".join(report._summary(skill, dict(cfg, forecast={"forcing": "climatology"})))
    assert "perfect forcing" in text and "not measured here" in text and "hindcast.forcing=climatology" in text
    text = " ".join(report._summary(skill, dict(cfg, forecast={"forcing": "observed"})))
    assert "The same kind" in text and "not measured" not in text


def test_report_links_figures_beyond_the_size_limit(study, tmp_path, monkeypatch):
    """Issue case at a smaller scale (common practice, no published source): with hundreds
    of figures past the embedding limit, the report links each one (relative path into
    figures/) instead of embedding it, and stays small; basins without figures are listed."""
    import shutil

    cfg, _ = study
    big = type(cfg)(dict(cfg, results=str(tmp_path / "r")))
    shutil.copytree(paths.results(cfg), paths.results(big))
    png = next(paths.figures(big).glob("*.png")).read_bytes()
    for i in range(300):
        (paths.figures(big) / plots.figure_name("hydrograph", f"extra{i:03d}")).write_bytes(png)
    monkeypatch.setattr(report, "EMBED_LIMIT_BYTES", 2 * len(png))
    text = report.render_report(big)
    assert "data:image/png" not in text
    assert text.count('href="figures/hydrograph__extra') == 300
    assert len(text.encode()) < 400_000
    assert "Basins without figures (1)" in text and "Alder Creek (alder)" in text


def test_report_innovation_section_reads_analysis_nc(tmp_path):
    """The innovation section shows, per basin, the statistics written in analysis.nc and
    the reading innovation_reading gives for them (thresholds documented in the section);
    common practice, no published source for the presentation."""
    import numpy as np

    from assim.filters.consistency import STATISTICS
    from assim.io.products import RunWriter, open_product

    cfg = assim.load_config(None, data={"prepared": str(tmp_path / "p"), "raw": str(tmp_path / "raw")},
                            results=str(tmp_path / "r"))
    path = paths.run_product(cfg, "assimilate")
    path.parent.mkdir(parents=True)
    rng = np.random.default_rng(0)
    n = 200
    d = rng.normal(0.0, 1.0, (2, n)) * np.array([[1.0], [2.0]])  # basin b: innovations too large
    block = {"discharge": rng.gamma(2.0, 3.0, (2, n, 4)), "discharge_analysis": rng.gamma(2.0, 3.0, (2, n, 4)),
             "innovation": d, "innovation_variance": np.ones((2, n)), "innovation_analysis": 0.5 * d,
             "obs_error_variance": np.full((2, n), 0.5)}
    with RunWriter(path, basins=["a", "b"], days=np.arange(18000, 18000 + n), members=4,
                   mode="assimilate") as w:
        w.write_block(0, block)
        w.write_innovation_statistics()
    text = report.render_report(cfg)
    section = text.split('id="innovations"')[1].split("<h2")[0]
    assert "Desroziers" in section
    with open_product(path) as ds:
        rows = [{k: ds[k].values[i] for k in STATISTICS} for i in range(2)]
    lines = section.split("<tr>")
    for basin, row in zip(("a", "b"), rows, strict=True):
        line = next(tr for tr in lines if f'<td class="l">{basin}</td>' in tr)
        assert f"<td>{int(row['innovation_count'])}</td>" in line
        assert f"<td>{row['innovation_chi2']:.3g}</td>" in line
        assert report.innovation_reading(row) in line
    assert "under-dispersed" in report.innovation_reading(rows[1])


def test_innovation_reading_thresholds():
    """Each documented threshold of the reading changes it (common practice, no published
    source): chi-square beyond its interval and 20% from 1, |mean z| > 0.5, Desroziers
    beyond 1.5 times R used."""
    base = {"innovation_count": 400, "normalised_innovation_mean": 0.0, "innovation_chi2": 1.0,
            "innovation_chi2_lower": 0.9, "innovation_chi2_upper": 1.1, "obs_error_variance_desroziers": 1.0,
            "obs_error_variance_used": 1.0, "normalised_innovation_variance": 1.0}
    read = report.innovation_reading
    assert read(base) == "consistent"
    assert read({**base, "innovation_chi2": 1.15}) == "consistent"  # outside the interval, within 20%
    assert read({**base, "innovation_chi2": 1.3}).startswith("ensemble under-dispersed")
    assert read({**base, "innovation_chi2": 0.7}).startswith("ensemble over-dispersed")
    assert "background biased" in read({**base, "normalised_innovation_mean": 0.6})
    assert "too small: Desroziers estimate 1.6 vs 1 used" in read({**base, "obs_error_variance_desroziers": 1.6})
    assert "too large" in read({**base, "obs_error_variance_desroziers": 0.6})
    assert read({**base, "innovation_count": 29}).startswith("too few readings")
