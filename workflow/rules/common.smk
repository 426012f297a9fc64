# Validate the config against the package's schema (assim/schemas/config.schema.yaml) with the same function the
# CLI uses (assim.config.validate), so the workflow and a user at the shell can never
# disagree, and define the helpers the rules share.

import os
import json
import shlex
import sys

import yaml

from assim import paths
from assim.config import read_config_file, validate
from assim.io import raw as raw_io
from assim.pipeline import latest_issue_date
from assim.errors import ConfigError


def _config_file():
    # The last --configfile wins; without one, the Snakefile's configfile.
    files = [str(f) for f in workflow.configfiles]
    return files[-1] if files else "config/config.yaml"


CONFIG_FILE = _config_file()

try:
    # Snakemake has read the file already, keeping the last of a key given twice: the
    # project's own read refuses that (and names the key and line) before anything runs.
    WRITTEN = read_config_file(CONFIG_FILE)
    CFG = validate(config, source=CONFIG_FILE)
except ConfigError as _exc:
    sys.stderr.write(f"assim workflow: config error: {_exc}\n")
    raise SystemExit(2)


def _flat_differences(effective, written, prefix=""):
    """Dotted keys whose value in the effective config differs from the config file."""
    out = {}
    for key, value in effective.items():
        name = f"{prefix}{key}"
        if isinstance(value, dict) and isinstance(written.get(key), dict):
            out.update(_flat_differences(value, written[key], name + "."))
        elif key not in written or written[key] != value:
            out[name] = value
    return out


def _cli_overrides():
    # Values given with `snakemake --config key=value` (or merged from several config
    # files) reach the CLI as --set options, so the CLI computes with the same settings.
    written = validate(WRITTEN, source=CONFIG_FILE)
    diff = _flat_differences(CFG, written)
    diff.pop("issue_date", None)  # passed as --issue-date
    return " ".join(f"--set {shlex.quote(k + '=' + json.dumps(v))}" for k, v in sorted(diff.items()))


ASSIM = f"{shlex.quote(sys.executable)} -m assim"
CLI_CONFIG = f"--config {shlex.quote(CONFIG_FILE)} {_cli_overrides()}".strip()

RESULTS = str(paths.results(CFG))
LOGS = str(paths.logs(CFG))
BENCH = f"{RESULTS}/benchmarks"
PREPARED = [str(paths.prepared(CFG, n)) for n in ("forcing.nc", "observations.nc", "basins.nc")]
RAW = [f"{CFG['data']['raw']}/{n}" for n in ("basins.yaml", "weather.csv", "gauge.csv")]


def settings(*sections):
    """The config sections a stage depends on, as one JSON string for `params:`.

    Snakemake reruns a job whose params changed, so changing e.g. `hindcast.leads` reruns
    the hindcast and what depends on it, and nothing else. Settings that do not change
    results (scheduler, workers, chunk sizes, progress) are left out on purpose.
    """
    chosen = {}
    for s in sections:
        if s == "ensemble":
            # the kernel changes results in the last bits: a change reruns the stage
            chosen[s] = {k: CFG[s].get(k) for k in ("members", "seed", "kernel")}
        else:
            chosen[s] = CFG[s]
    return json.dumps(chosen, sort_keys=True)


def issue_date():
    """The workflow's forecast date: config issue_date, else the latest day the inputs
    allow (the last day of weather.csv, read from the file's end; for forecast.forcing
    observed, minus the leads), the same rule as `assim forecast` without --issue-date."""
    if CFG["issue_date"] and str(CFG["issue_date"]) != "latest":
        return str(CFG["issue_date"])
    last = raw_io.last_weather_day(f"{CFG['data']['raw']}/{raw_io.WEATHER_FILE}")
    return latest_issue_date(CFG, last) if last is not None else None


def all_products():
    out = [
        f"{RESULTS}/openloop.nc",
        f"{RESULTS}/analysis.nc",
        f"{RESULTS}/hindcast.nc",
        f"{RESULTS}/skill.nc",
        f"{RESULTS}/skill.csv",
        f"{RESULTS}/figures",
        f"{RESULTS}/report.html",
    ]
    if issue_date():
        out.append(str(paths.forecast(CFG, issue_date())))
    return out
