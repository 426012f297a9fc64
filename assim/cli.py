"""The ``assim`` command line: a thin layer over :mod:`assim.pipeline`.

Exit status 0 on success; 2 on bad input or config, with one line on stderr naming file,
variable and place (never a traceback for a user error).
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
    s = add("run", "ensemble run: open loop or assimilation of gauge readings")
    s.add_argument("--mode", choices=["openloop", "assimilate"], default="assimilate")
    s.add_argument("--restart-from", metavar="FILE", help="continue from this restart file")
    s.add_argument("--until", metavar="YYYY-MM-DD", help="last day to run (default: period end)")
    add("hindcast", "hindcast experiments: forecasts from open-loop and assimilation states")
    s = add("forecast", "operational forecast for one issue date, from the latest restart")
    s.add_argument("--issue-date", required=True, metavar="YYYY-MM-DD")
    add("verify", "skill of runs and hindcasts against observations (skill.nc, skill.csv)")
    s = add("plot", "figures (PNG) of runs, hindcasts, skill and forecasts")
    s.add_argument("--issue-date", metavar="YYYY-MM-DD", help="also draw the plume of this forecast")
    add("report", "self-contained HTML report of a hindcast study")
    return p


def _overrides(items: Sequence[str]) -> dict:
    """``["a.b=1", "c=[x]"]`` -> ``{"a": {"b": 1}, "c": ["x"]}`` (values parsed as YAML)."""
    import yaml

    from assim.errors import ConfigError

    out: dict = {}
    for item in items:
        key, sep, text = item.partition("=")
        if not sep or not key.strip():
            raise ConfigError("expected KEY=VALUE", file="--set", variable=item)
        try:
            value = yaml.safe_load(text)
        except yaml.YAMLError:
            raise ConfigError("VALUE is not valid YAML", file="--set", variable=key) from None
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
        pipeline.prep(cfg)
        return f"prepared layer written to {cfg['data']['prepared']}"
    if cmd == "check":
        return pipeline.check(cfg)
    if cmd == "run":
        ds = pipeline.run(cfg, mode=args.mode, restart_from=args.restart_from, until=args.until)
        return f"{args.mode} run written: {ds.attrs.get('product_path', cfg['results'])}"
    if cmd == "hindcast":
        ds = pipeline.hindcast(cfg)
        return f"hindcast written: {ds.attrs.get('product_path', cfg['results'])}"
    if cmd == "forecast":
        ds = pipeline.forecast(cfg, args.issue_date)
        return (f"forecast written: {ds.attrs.get('product_path', cfg['results'])}\n"
                f"analysis {ds.attrs.get('analysis', 'unknown')}")
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
    print(message)
    if args.command not in ("check", "prep"):
        print(f"CAUTION: {CAUTION}")
    return 0
