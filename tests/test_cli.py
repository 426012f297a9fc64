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
