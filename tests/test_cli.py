"""Tests of the CLI shell: exit status, one-line errors, --set overrides."""

import subprocess
import sys

import pytest

from assim.cli import _overrides, main
from assim.errors import ConfigError


def _run(*args, cwd=None):
    return subprocess.run(
        [sys.executable, "-m", "assim", *args], capture_output=True, text=True, cwd=cwd
    )


def test_set_parses_yaml_values():
    assert _overrides(["ensemble.members=32", "outputs.figures=[a, b]", "filter.method=eakf"]) == {
        "ensemble": {"members": 32},
        "outputs": {"figures": ["a", "b"]},
        "filter": {"method": "eakf"},
    }


def test_set_without_equals_is_a_config_error():
    with pytest.raises(ConfigError):
        _overrides(["ensemble.members"])


@pytest.mark.parametrize(
    "args",
    [
        ("check", "--config", "no-such-config.yaml"),
        ("run", "--config", "no-such-config.yaml"),
        ("check", "--config", "config/config.yaml", "--set", "ensemble.members=1"),
        ("check", "--config", "config/config.yaml", "--set", "nonsense.key=1"),
    ],
)
def test_user_errors_exit_2_with_one_line(args):
    r = _run(*args)
    assert r.returncode == 2
    lines = [line for line in r.stderr.splitlines() if line.strip()]
    assert len(lines) == 1, r.stderr
    assert "Traceback" not in r.stderr


def test_version():
    assert main(["--version"]) == 0


def test_every_subcommand_prints_the_caution_once(tmp_path):
    """Common practice, no published source (the project's rule that every command-line run
    carries the caution): each subcommand, prep and check included, ends its standard output
    with the caution, exactly once, and leaves it off standard error."""
    import os

    from _scenario import make_raw, write_config

    from assim.caution import CAUTION

    make_raw(tmp_path / "raw", ["oskerrin"], "2012-01-01", "2012-04-30")
    conf = write_config(tmp_path, {
        "data": {"raw": str(tmp_path / "raw"), "prepared": str(tmp_path / "prepared")},
        "results": str(tmp_path / "results"),
        "period": {"start": "2012-01-01", "end": "2012-04-20", "spinup_days": 20},
        "ensemble": {"members": 4, "seed": 5, "scheduler": "synchronous", "progress": False},
        "hindcast": {"every_days": 20, "leads": 3, "forcing": "observed"},
        "forecast": {"leads": 3, "forcing": "observed"},
        "calibration": {"start": "2012-02-01", "end": "2012-03-15", "validation_start": "2012-03-16",
                        "validation_end": "2012-04-20", "warmup_days": 30, "min_days": 20,
                        "population": 8, "max_generations": 2, "seed": 1},
    })
    env = {**os.environ, "PYTHONWARNINGS": "ignore"}
    commands = [("calibrate",), ("prep",), ("check",), ("run", "--mode", "openloop"), ("run", "--mode", "assimilate"),
                ("hindcast",), ("forecast", "--issue-date", "2012-04-20"), ("verify",),
                ("plot", "--issue-date", "2012-04-20"), ("report",)]
    from assim.cli import _parser

    sub = next(a for a in _parser()._actions if a.dest == "command")
    assert {c[0] for c in commands} == set(sub.choices)
    for args in commands:
        r = subprocess.run([sys.executable, "-m", "assim", *args, "--config", str(conf)],
                           capture_output=True, text=True, env=env, cwd=tmp_path, timeout=300)
        assert r.returncode == 0, (args, r.stderr)
        assert r.stdout.count(CAUTION) == 1, (args, r.stdout)
        assert r.stdout.rstrip().endswith(CAUTION), args
        assert CAUTION not in r.stderr, args
