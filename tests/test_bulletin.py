"""Tests of assim.bulletin: raised alerts, the alert files, and the page in a real browser."""

from __future__ import annotations

import csv
import html
import json
import os
import re
import shutil
import subprocess

import numpy as np
import pandas as pd
import pytest
from test_verification import make_study  # the synthetic study shared by the product tests

from assim import bulletin, paths
from assim.caution import CAUTION
from assim.io.products import open_product, write_forecast


def test_raised_alerts_follow_the_levels(tmp_path):
    """Common practice, no published source: a threshold is raised when its exceedance
    probability (fraction of members strictly above) reaches the alert level at some lead;
    the first lead at or above the level and the lead of the highest probability are
    reported; a per-threshold level overrides the default; thresholds listed by value."""
    q = np.array([[[0.5, 0.5, 0.5], [12.0] * 3, [12.0] * 3],  # b0: above both from lead 2
                  [[0.5] * 3, [0.5] * 3, [11.0] * 3]])  # b1: above 10 only at lead 3
    q = np.repeat(q[..., :1], 8, axis=-1)
    q[1, 2, 6:] = 0.5  # b1 lead 3: 6 of 8 members above 10 (0.75)
    ds = write_forecast(tmp_path / "f.nc", basins=["b0", "b1"], issue_day=18383, discharge=q, quantiles=[0.5],
                        thresholds={"q10y": np.array([10.0, 20.0]), "q2y": np.array([5.0, 10.0])},  # higher first
                        analysis="performed")
    alerts = bulletin.raised_alerts(ds, {"q10y": 0.5, "q2y": 0.8})
    got = [(a["basin"], a["threshold"], a["first_lead"], a["peak_lead"], a["max_probability"]) for a in alerts]
    # b0: q2y (5) before q10y (10), both reached at lead 2; b1: q2y = 10 reached 0.75 < 0.8
    assert got == [("b0", "q2y", 2, 2, 1.0), ("b0", "q10y", 2, 2, 1.0)]
    assert alerts[0]["first_valid_date"] == "2020-05-03" and alerts[0]["issue_date"] == "2020-05-01"
    alerts = bulletin.raised_alerts(ds, {"q10y": 0.5, "q2y": 0.75})
    assert ("b1", "q2y", 3) in [(a["basin"], a["threshold"], a["first_lead"]) for a in alerts]
    cfg = {"bulletin": {"alert_probability": 0.4, "alert_levels": {"q2y": 0.9}}}
    assert bulletin.alert_levels(cfg, ds) == {"q10y": 0.4, "q2y": 0.9}


def test_alert_files_for_a_scheduled_job(tmp_path):
    """Common practice, no published source: JSON with the issue date, the caution and the
    list; CSV with one header line and a row per alert (header alone when none)."""
    rec = {"issue_date": "2020-05-01", "basin": "b0", "name": "B zero", "threshold": "q2y", "threshold_m3s": 5.0,
           "alert_probability": 0.5, "max_probability": 0.75, "first_lead": 2, "first_valid_date": "2020-05-03",
           "peak_lead": 3}
    j, c = bulletin.write_alerts([rec], tmp_path / "a.json", tmp_path / "a.csv", issue_date="2020-05-01")
    doc = json.loads(j.read_text())
    assert doc["raised"] == 1 and doc["alerts"][0]["basin"] == "b0" and doc["caution"] == CAUTION
    rows = list(csv.DictReader(c.open()))
    assert len(rows) == 1 and rows[0]["threshold"] == "q2y" and float(rows[0]["max_probability"]) == 0.75
    bulletin.write_alerts([], tmp_path / "a.json", tmp_path / "a.csv", issue_date="2020-05-01")
    assert (tmp_path / "a.csv").read_text().splitlines() == [",".join(bulletin.ALERT_FIELDS)]
    assert json.loads((tmp_path / "a.json").read_text())["alerts"] == []


@pytest.fixture(scope="module")
def page(tmp_path_factory):
    """The bulletin of the synthetic study's forecast, with a raised alert."""
    from assim.io.prepared import read_observations, usable_discharge

    tmp = tmp_path_factory.mktemp("bulletin")
    cfg, truth = make_study(tmp, days=60, members=8, leads=2)
    day = truth["issue_date"]
    fc = open_product(paths.forecast(cfg, day), load=True)
    fc.attrs["forcing"] = "climatology"
    fc.attrs["forcing_note"] = "Only 3 distinct past years of weather (climatology forcing) for 8 members."
    fc.attrs["restart"] = "results/restart.nc"
    observed = usable_discharge(read_observations(paths.prepared(cfg, "observations.nc")))
    observed = observed.assign_coords(basin=[str(b) for b in observed["basin"].values])
    with open_product(paths.run_product(cfg, "assimilate")) as an:
        recent = an["discharge"].load()  # analysis.nc: the analysis
    levels = {t: 0.1 for t in fc["threshold"].values}
    written = bulletin.write_bulletin(
        fc, html_path=paths.bulletin(cfg, day), figure_folder=paths.bulletin_figures(cfg, day),
        alerts_json=paths.alerts(cfg, day, "json"), alerts_csv=paths.alerts(cfg, day, "csv"), levels=levels,
        observed=observed, recent=recent, latest_reading={"alder": pd.Timestamp(day) - pd.Timedelta(days=2)},
        weather_through=pd.Timestamp(day), names={"alder": "Alder Creek"}, history_days=20)
    return cfg, day, fc, written


def test_bulletin_page_content(page):
    """Common practice, no published source: caution first, raised alerts before the basin
    sections, the trace note, the restart, the ages of the inputs, a probability table per
    basin equal to the forecast's, one embedded PNG per basin and nothing external."""
    cfg, day, fc, written = page
    text = paths.bulletin(cfg, day).read_text(encoding="utf-8")
    body = html.unescape(re.sub(r"<[^>]+>", " ", text))
    body = " ".join(body.split())
    assert body.index(CAUTION) < body.index("Raised") < body.index("Exceedance probability by basin")
    assert "Only 3 distinct past years" in body and "results/restart.nc" in body
    assert "(2 days before the issue)" in body and "(0 days before the issue)" in body
    assert text.count('<img src="data:image/png;base64,') == fc.sizes["basin"]
    assert not re.search(r"(src|href)=\"(?!data:|#)", text)
    p = fc["exceedance_probability"].sel(basin="alder").transpose("threshold", "lead").values
    for row in p:
        assert "".join(f"{x:.0%}</td>" for x in row) in re.sub(r"<td[^>]*>", "", text)
    pngs = sorted(paths.bulletin_figures(cfg, day).glob("*.png"))
    assert len(pngs) == fc.sizes["basin"] and set(pngs) <= set(written)
    alerts = json.loads(paths.alerts(cfg, day, "json").read_text())["alerts"]
    assert alerts and all(a["max_probability"] >= 0.1 for a in alerts)


def _chromium():
    return shutil.which("chromium") or shutil.which("chromium-browser")


_CHECK = """<script>
window.addEventListener('load', function () {
  var imgs = Array.prototype.slice.call(document.images);
  var c = document.getElementById('caution'), r = c.getBoundingClientRect(), st = getComputedStyle(c);
  var out = {images: imgs.length,
             loaded: imgs.filter(function (i) { return i.complete && i.naturalWidth > 0; }).length,
             caution_visible: r.height > 0 && r.top >= 0 && r.bottom <= window.innerHeight &&
                              st.visibility === 'visible' && st.display !== 'none' && c.innerText.length > 50,
             alert_table: !!document.getElementById('alert-table') &&
                          document.getElementById('alert-table').rows.length > 1};
  var pre = document.createElement('pre'); pre.id = 'check'; pre.textContent = JSON.stringify(out);
  document.body.appendChild(pre);
});
</script>"""


@pytest.mark.skipif(_chromium() is None, reason="chromium is not installed (.ci/run installs it on Debian)")
def test_bulletin_renders_in_headless_chromium(page, tmp_path):
    """Reference: a real browser (Debian's chromium, headless). In a copy of the page with a
    small script added, every figure has loaded (naturalWidth > 0), the caution is visible in
    the first screen, and the alert table is present; the screenshot is a real image."""
    cfg, day, fc, _ = page
    copy = tmp_path / "check.html"
    copy.write_text(paths.bulletin(cfg, day).read_text(encoding="utf-8").replace("</body>", _CHECK + "</body>"),
                    encoding="utf-8")
    base = [_chromium(), "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
            "--disable-background-networking", "--disable-component-update", "--disable-sync",
            f"--user-data-dir={tmp_path / 'profile'}", "--window-size=1200,900", "--virtual-time-budget=5000"]
    env = {**os.environ, "HOME": str(tmp_path)}
    out = subprocess.run([*base, "--dump-dom", copy.as_uri()], capture_output=True, text=True, timeout=180, env=env)
    found = re.search(r'<pre id="check">(.*?)</pre>', out.stdout)
    assert found, out.stderr[-2000:]
    check = json.loads(html.unescape(found.group(1)))
    assert check == {"images": fc.sizes["basin"], "loaded": fc.sizes["basin"], "caution_visible": True,
                     "alert_table": True}
    shot = tmp_path / "bulletin.png"
    subprocess.run([*base, f"--screenshot={shot}", paths.bulletin(cfg, day).as_uri()], capture_output=True,
                   timeout=180, env=env)
    from matplotlib.image import imread

    image = imread(shot)
    assert image.shape[:2] == (900, 1200)
    assert image[..., :3].std() > 0.05  # not a blank page
    if os.environ.get("ASSIM_KEEP_SCREENSHOT"):
        shutil.copy(shot, os.environ["ASSIM_KEEP_SCREENSHOT"])


def test_bulletin_figure_shows_the_assimilated_history(page, monkeypatch, tmp_path):
    """Common practice, no published source: the bulletin figure draws the assimilated
    ensemble (median = the recent members' median) before the issue, and the thresholds
    with the severity ramp, lightest for the lowest value."""
    import matplotlib.colors as mcolors

    import assim.plots as plots

    cfg, day, fc, _ = page
    drawn = []
    monkeypatch.setattr(plots, "_save", lambda fig, path: drawn.append(fig) or path)
    with open_product(paths.run_product(cfg, "assimilate")) as an:
        recent = an["discharge"].load()  # analysis.nc: the analysis
    plots.plot_plume(fc, None, "alder", tmp_path / "x.png", history_days=10, recent=recent)
    ax = drawn[0].axes[0]
    start = pd.Timestamp(day) - pd.Timedelta(days=9)
    expected = recent.sel(basin="alder", time=slice(start, day)).median("member").values
    medians = [ln.get_ydata() for ln in ax.lines if len(ln.get_ydata()) == len(expected)]
    assert any(np.allclose(m, expected) for m in medians)
    hlines = [ln for ln in ax.lines if len(set(np.atleast_1d(ln.get_ydata()))) == 1 and ln.get_linestyle() == "--"]
    values = [ln.get_ydata()[0] for ln in hlines]
    lum = [np.dot(mcolors.to_rgb(ln.get_color()), [0.2126, 0.7152, 0.0722]) for ln in hlines]
    order = np.argsort(values)
    assert len(hlines) == 2 and np.all(np.diff(np.array(lum)[order]) < 0)
