"""The Snakemake workflow end to end on a shortened copy of the demo config.

Checks: every declared output exists, NetCDF products pass the CF-1.8 checks of
compliance-checker (reference tool) and carry the caution, a dry run afterwards has nothing
to do, changing one stage's setting reruns only what depends on it, and a config that fails
the schema stops the workflow before any rule runs.
"""

import subprocess
import sys
from pathlib import Path

import pytest
import xarray as xr
import yaml

from assim.caution import CAUTION

REPO = Path(__file__).resolve().parents[1]
SNAKEMAKE = [sys.executable, "-m", "snakemake", "--snakefile", str(REPO / "workflow" / "Snakefile")]

pytestmark = pytest.mark.slow


def _short_config(root: Path, **changes) -> Path:
    cfg = yaml.safe_load((REPO / "config" / "config.yaml").read_text())
    cfg["data"]["raw"] = str(REPO / "sample_basin")
    cfg["period"] = {"start": "2012-01-01", "end": "2013-06-30", "spinup_days": 120}
    cfg["ensemble"]["members"] = 16
    cfg["hindcast"] = {"every_days": 14, "leads": 4, "forcing": "observed"}
    cfg["forecast"]["leads"] = 4
    # the forecast issued at the end of the run's last day (the default, the last day of the
    # weather, lies ten years on)
    cfg["issue_date"] = "2013-06-30"
    for section, values in changes.items():
        cfg.setdefault(section, {}).update(values)
    (root / "config").mkdir(parents=True, exist_ok=True)
    path = root / "config" / "config.yaml"
    path.write_text(yaml.safe_dump(cfg, sort_keys=False))
    return path


def _snakemake(root: Path, *args):
    return subprocess.run(
        [*SNAKEMAKE, "--directory", str(root), "--cores", "2", *args],
        capture_output=True,
        text=True,
        timeout=1500,
    )


@pytest.fixture(scope="module")
def finished(tmp_path_factory):
    root = tmp_path_factory.mktemp("workflow")
    _short_config(root)
    r = _snakemake(root)
    assert r.returncode == 0, r.stderr[-4000:]
    return root


def _declared_outputs(root: Path):
    return [
        "results/prepared/forcing.nc",
        "results/prepared/observations.nc",
        "results/prepared/basins.nc",
        "results/openloop.nc",
        "results/analysis.nc",
        "results/restart.nc",
        "results/hindcast.nc",
        "results/forecasts/forecast-2013-06-30.nc",
        "results/forecasts/restart-2013-06-30.nc",
        "results/skill.nc",
        "results/skill.csv",
        "results/report.html",
    ]


def test_every_declared_output_exists(finished):
    missing = [p for p in _declared_outputs(finished) if not (finished / p).is_file()]
    assert missing == []
    figures = list((finished / "results" / "figures").glob("*.png"))
    assert figures, "no figures drawn"
    for rule in ("prep", "openloop", "assimilation", "hindcast", "verify", "figures", "report"):
        assert (finished / "results" / "logs" / f"{rule}.log").is_file()


def test_products_carry_the_caution(finished):
    for p in _declared_outputs(finished):
        if p.endswith(".nc") and "/prepared/" not in p:
            with xr.open_dataset(finished / p) as ds:
                assert ds.attrs.get("caution") == CAUTION, p
    assert "subordinate to official flood warnings" in (finished / "results/report.html").read_text()


def test_products_are_cf_clean(finished):
    """compliance-checker's CF-1.8 suite (reference tool) reports no failure in any NetCDF
    file the workflow declares (restarts included), and plain xarray selects a basin by its
    id in each."""
    from _cf import cf_failures

    for p in _declared_outputs(finished):
        if not p.endswith(".nc"):
            continue
        assert cf_failures(finished / p) == ([], []), p
        with xr.open_dataset(finished / p) as ds:
            assert "basin" not in ds.sel(basin=str(ds["basin"].values[0])).dims, p


def test_dry_run_afterwards_has_nothing_to_do(finished):
    r = _snakemake(finished, "--dry-run")
    assert r.returncode == 0, r.stderr[-2000:]
    assert "Nothing to be done" in r.stdout + r.stderr


def test_changing_one_stage_reruns_only_what_depends_on_it(finished):
    _short_config(finished, hindcast={"leads": 3})
    try:
        r = _snakemake(finished, "--dry-run")
        text = r.stdout + r.stderr
        for rule in ("hindcast", "verify", "figures", "report"):
            assert f"rule {rule}:" in text or f"localrule {rule}:" in text, text[-3000:]
        for rule in ("prep", "openloop", "assimilation"):
            assert f"rule {rule}:" not in text and f"localrule {rule}:" not in text, rule
    finally:
        _short_config(finished)


def test_config_failing_the_schema_stops_before_any_rule(tmp_path):
    _short_config(tmp_path, ensemble={"members": 1})
    r = _snakemake(tmp_path)
    assert r.returncode != 0
    assert "ensemble.members" in r.stderr and "minimum of 2" in r.stderr
    assert not (tmp_path / "results").exists()


def test_config_with_a_key_given_twice_stops_with_one_line(tmp_path):
    """Snakemake reads --configfile keeping the last of a duplicated key; the workflow reads
    the file again with the project's loader and refuses it (exit 2, the key and both lines
    named, no traceback) before any rule runs."""
    path = _short_config(tmp_path)
    text = path.read_text().replace("  members: 16\n", "  members: 16\n  members: 3\n")
    path.write_text(text)
    first = text.splitlines().index("  members: 16") + 1
    r = _snakemake(tmp_path, "--configfile", str(path))
    assert r.returncode == 2, r.stderr[-2000:]
    assert f"'members' given twice (first on line {first})" in r.stderr
    assert f"line {first + 1}" in r.stderr and "Traceback" not in r.stderr
    assert not (tmp_path / "results").exists()
