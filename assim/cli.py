"""The ``assim`` command line: a thin layer over :mod:`assim.pipeline`.

Exit status 0 on success; 2 on bad input or config, and also when the machine fails a write
(a full disk, an unwritable folder, a lock held by another run): one line on stderr naming
file, variable and place, never a traceback, and the earlier files left as they were. One
status for both, because for a caller both mean the same: nothing was replaced, fix the cause
and run the command again. A closed stdout (the summary's reader went away) is not an error.
Every subcommand that succeeds ends its standard output with the caution
(:data:`assim.caution.CAUTION`), once.
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence

from assim.caution import CAUTION
from assim.errors import AssimError

DEFAULT_CONFIG = "config/config.yaml"


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="assim",
        description="Ensemble Kalman filter assimilation of river gauge readings and ensemble "
        "streamflow forecasts. " + CAUTION,
    )
    p.add_argument("--version", action="store_true", help="print the version and exit")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")

    def add(name: str, help_: str) -> argparse.ArgumentParser:
        s = sub.add_parser(name, help=help_, description=help_)
        s.add_argument("--config", default=DEFAULT_CONFIG, help=f"config file (default {DEFAULT_CONFIG})")
        s.add_argument(
            "--set",
            action="append",
            default=[],
            metavar="KEY=VALUE",
            help="override one config key, e.g. --set ensemble.members=32 (VALUE is YAML)",
        )
        return s

    add("prep", "prepare raw records (basins.yaml, weather.csv, gauge.csv) into CF NetCDF")
    add("check", "validate the config and inputs and summarise them")
    add("calibrate", "calibrate each basin's model parameters against its gauge (calibration.nc)")
    s = add("run", "ensemble run: open loop, assimilation of gauge readings, or reanalysis (smoothed)")
    s.add_argument("--mode", choices=["openloop", "assimilate", "reanalysis"], default="assimilate",
                   help="reanalysis: the fixed-lag smoothed ensemble (reanalysis.nc; filter.smoother.window_days)")
    s.add_argument("--restart-from", metavar="FILE", help="continue from this restart file")
    s.add_argument("--until", metavar="YYYY-MM-DD", help="last day to run (default: period end)")
    add("hindcast", "hindcast experiments: forecasts from open-loop and assimilation states")
    s = add("forecast", "operational forecast for one issue date, from the latest restart")
    s.add_argument("--issue-date", default="latest", metavar="YYYY-MM-DD",
                   help="the forecast is issued at the end of this UTC day: it assimilates the "
                   "readings through the day, lead 1 is the next day (default: latest, the last "
                   "day of the prepared weather; for forecast.forcing observed, that day minus "
                   "the leads)")
    add("verify", "skill of runs and hindcasts against observations (skill.nc, skill.csv)")
    s = add("plot", "figures (PNG) of runs, hindcasts, skill and forecasts")
    s.add_argument("--issue-date", metavar="YYYY-MM-DD", help="also draw the plume of this forecast")
    add("report", "self-contained HTML report of a hindcast study")
    return p


def _overrides(items: Sequence[str]) -> dict:
    """``["a.b=1", "c=[x]"]`` -> ``{"a": {"b": 1}, "c": ["x"]}`` (values parsed as YAML)."""
    import yaml

    from assim.errors import ConfigError
    from assim.io.common import load_yaml, yaml_problem

    out: dict = {}
    for item in items:
        key, sep, text = item.partition("=")
        if not sep or not key.strip():
            raise ConfigError("expected KEY=VALUE", file="--set", variable=item)
        try:
            value = load_yaml(text)  # dates stay text, as in the config file
        except yaml.YAMLError as exc:
            raise ConfigError(f"VALUE is not valid YAML ({yaml_problem(exc)[0]})", file="--set",
                              variable=key) from None
        *parents, leaf = key.strip().split(".")
        node = out
        for p in parents:
            node = node.setdefault(p, {})
            if not isinstance(node, dict):
                raise ConfigError("conflicting overrides", file="--set", variable=key)
        node[leaf] = value
    return out


def _dispatch(args: argparse.Namespace) -> str:
    """Run the command; every warning it raises (a stale lock replaced, a restart written
    with other settings) is printed as one line on stderr."""
    import warnings

    from assim.config import load_config
    from assim.errors import AssimWarning

    def one_line(message, category, filename, lineno, file=None, line=None):
        print(f"assim {args.command}: warning: {message}", file=sys.stderr)

    cfg = load_config(args.config, **_overrides(args.set))
    with warnings.catch_warnings():
        warnings.showwarning = one_line
        warnings.simplefilter("always", AssimWarning)
        return _command(cfg, args)


def _command(cfg, args: argparse.Namespace) -> str:
    from assim import pipeline

    cmd = args.command
    if cmd == "prep":
        layer = pipeline.prep(cfg)
        return f"prepared layer written to {cfg['data']['prepared']}: {layer.forcing.attrs.get('prepared', '')}"
    if cmd == "check":
        return pipeline.check(cfg)
    if cmd == "calibrate":
        ds = pipeline.calibrate(cfg)
        from assim.calibration_study import summary

        summary = summary(ds)
        return f"calibration written: {ds.attrs.get('product_path', cfg['results'])}\n{summary}"
    if cmd == "run":
        ds = pipeline.run(cfg, mode=args.mode, restart_from=args.restart_from, until=args.until)
        return f"{args.mode} run written: {ds.attrs.get('product_path', cfg['results'])}"
    if cmd == "hindcast":
        ds = pipeline.hindcast(cfg)
        return f"hindcast written: {ds.attrs.get('product_path', cfg['results'])}"
    if cmd == "forecast":
        ds = pipeline.forecast(cfg, args.issue_date)
        note = ds.attrs.get("forcing_note", "none")
        return (f"forecast written: {ds.attrs.get('product_path', cfg['results'])}\n"
                f"bulletin written: {ds.attrs.get('bulletin', 'none')}\n"
                f"analysis {ds.attrs.get('analysis', 'unknown')}"
                + (f"\nnote: {note}" if note != "none" else ""))
    if cmd == "verify":
        ds = pipeline.verify(cfg)
        return f"skill written: {ds.attrs.get('product_path', cfg['results'])}"
    if cmd == "plot":
        paths = pipeline.plot(cfg, issue_date=args.issue_date)
        return "figures written:\n" + "\n".join(f"  {p}" for p in paths)
    if cmd == "report":
        return f"report written: {pipeline.report(cfg)}"
    raise AssertionError(cmd)


def main(argv: Sequence[str] | None = None) -> int:
    args = _parser().parse_args(argv)
    if args.version:
        from assim._version import __version__

        print(f"assim {__version__}")
        return 0
    if not args.command:
        _parser().print_help()
        return 2
    try:
        message = _dispatch(args)
    except AssimError as exc:
        print(f"assim {args.command}: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"assim {args.command}: interrupted; no partial output was kept", file=sys.stderr)
        return 130
    try:
        print(message)
        print(f"CAUTION: {CAUTION}")
        sys.stdout.flush()
    except BrokenPipeError:
        # stdout was closed by the reader (`assim forecast ... | head -0`): the files are
        # written; the summary has nowhere to go. Quiet exit, as a shell tool does.
        import os

        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 0
    return 0
