"""The command line: help for every command, exit codes, Error:/Hint: lines."""
from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest
import typer.main

from fleetwatch.cli import app

ROOT = Path(__file__).resolve().parents[1]


def run(*args: str, cwd: Path | None = None) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "fleetwatch", *args], capture_output=True,
                          text=True, cwd=cwd, timeout=120)


def _commands() -> dict:
    return typer.main.get_command(app).commands


def test_every_command_has_help_and_a_readme_entry():
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    cmds = _commands()
    assert {"init", "simulate", "demo"} <= set(cmds)
    for name, cmd in cmds.items():
        assert (cmd.help or "").strip(), f"command {name} has no help text"
        for p in cmd.params:
            if isinstance(p, __import__("click").Option):
                assert (p.help or "").strip(), f"option {p.name} of {name} has no help"
        assert f"fleetwatch {name}" in readme, f"command {name} is not in the README"


def test_top_level_help_lists_commands():
    r = run("--help")
    assert r.returncode == 0
    for name in _commands():
        assert name in r.stdout


@pytest.mark.parametrize("name", sorted(_commands()))
def test_command_help_exits_zero(name):
    r = run(name, "--help")
    assert r.returncode == 0, r.stderr
    assert "Usage" in r.stdout


def test_unknown_option_is_a_usage_error():
    r = run("init", "--no-such-option")
    assert r.returncode == 2
    assert "Traceback" not in r.stderr


def test_init_writes_config_and_refuses_to_overwrite(tmp_path):
    r = run("init", str(tmp_path / "proj"))
    assert r.returncode == 0, r.stderr
    assert (tmp_path / "proj" / "fleetwatch.toml").is_file()
    r = run("init", str(tmp_path / "proj"))
    assert r.returncode == 2
    lines = r.stderr.strip().splitlines()
    assert lines[0] == f"Error: {tmp_path / 'proj' / 'fleetwatch.toml'} already exists"
    assert lines[1].startswith("Hint: ")
    assert "Traceback" not in r.stderr


def test_python_dash_m_and_version():
    r = run("--version")
    assert r.returncode == 0 and r.stdout.strip() == __import__("fleetwatch").__version__
