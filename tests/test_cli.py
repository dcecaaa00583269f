"""The command line: exit codes, one-line errors, and which commands stay torch-free."""
from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

from depthplan.cli import main


def test_check_reports_the_plan(tiny_config: Path, capsys: pytest.CaptureFixture) -> None:
    assert main(["check", str(tiny_config)]) == 0
    out = capsys.readouterr().out
    assert "ok" in out and "cells    2 (4 seed runs" in out and "digits" in out


def test_bad_config_is_one_line_and_exit_2(write_yaml, capsys: pytest.CaptureFixture) -> None:
    bad = write_yaml("name: t\nsweep: {depths: [1, -2]}\n")
    assert main(["check", str(bad)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1
    assert "sweep.depths[1]: must be a positive integer, got -2" in err


@pytest.mark.parametrize("argv", [["run"], ["run", "x.yaml", "--workers", "two"], ["nonsense"]])
def test_usage_mistakes_exit_2(argv: list[str], capsys: pytest.CaptureFixture) -> None:
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and err.startswith("depthplan: ")


def test_workers_must_be_positive(tiny_config: Path, tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    assert main(["run", str(tiny_config), "--out", str(tmp_path / "r"), "--workers", "0"]) == 2
    assert "--workers: must be a positive integer" in capsys.readouterr().err


def test_tiny_sweep_through_the_cli(tiny_config: Path, tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    assert main(["run", str(tiny_config), "--out", str(tmp_path / "r"), "-q"]) == 0
    out = capsys.readouterr().out
    assert "4 seed runs stored" in out and "median T" in out


def _modules_after(code: str) -> set[str]:
    out = subprocess.run([sys.executable, "-c", code + "\nimport sys; print(' '.join(sys.modules))"],
                         capture_output=True, text=True, check=True).stdout
    return set(out.split())


def test_help_and_torch_free_modules_do_not_import_torch() -> None:
    assert "torch" not in _modules_after("import depthplan.cli, depthplan.storage, depthplan.sweep, depthplan.config")
    proc = subprocess.run([sys.executable, "-X", "importtime", "-m", "depthplan", "--help"],
                          capture_output=True, text=True)
    assert proc.returncode == 0 and "usage: depthplan" in proc.stdout
    assert " torch" not in proc.stderr      # -X importtime lists every module imported
