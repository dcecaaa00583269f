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
    # run ends with the depth to plan for, or says why there is none (two depths: no law)
    assert "No depth to plan for yet:" in out and "at least three" in out
    # each run records its network's shape for the FLOP count: load_digits has 64 features and
    # 10 classes (scikit-learn's documentation); width 8 and batch 32 come from the sweep file
    import json
    first = json.loads((tmp_path / "r" / "runs.jsonl").read_text().splitlines()[0])
    assert first["extra"]["network"] == {"n_inputs": 64, "n_classes": 10,
                                         "widths": [8] * first["depth"], "batch_size": 32}


def _modules_after(code: str) -> set[str]:
    out = subprocess.run([sys.executable, "-c", code + "\nimport sys; print(' '.join(sys.modules))"],
                         capture_output=True, text=True, check=True).stdout
    return set(out.split())


def test_help_and_torch_free_modules_do_not_import_torch() -> None:
    assert "torch" not in _modules_after("import depthplan.cli, depthplan.sweep.storage, depthplan.sweep.run, depthplan.config")
    proc = subprocess.run([sys.executable, "-X", "importtime", "-m", "depthplan", "--help"],
                          capture_output=True, text=True)
    assert proc.returncode == 0 and "usage: depthplan" in proc.stdout
    assert " torch" not in proc.stderr      # -X importtime lists every module imported


def test_fit_through_the_cli_on_a_measurements_table(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    import json

    # invented measurements: T = 6000 / K exactly at four depths, two seeds each
    rows = "".join(f"{k},{6000 // k},{s}\n" for k in (1, 2, 4, 8) for s in (0, 1))
    table = tmp_path / "timings.csv"
    table.write_text("depth,iterations,seed\n" + rows)
    out = tmp_path / "fit.json"
    assert main(["fit", str(table), "--json", str(out), "--bootstrap", "50"]) == 0
    fit = json.loads(out.read_text())
    assert fit["power_law"]["slope"] == pytest.approx(-1.0, abs=1e-3)
    assert "fit written to" in capsys.readouterr().out


@pytest.mark.parametrize("text, message", [
    ("depth,iterations\n1,100\n2,abc\n3,30\n", "line 3, column iterations"),
    ("depth,iters\n1,100\n", "missing column iterations"),
    ("depth,iterations\n1,100\n2,50\n", "at least three"),
    ("depth,iterations\n1,100\n0,50\n3,30\n", "line 3, column depth"),
])
def test_fit_refuses_a_bad_table_in_one_line(tmp_path: Path, capsys: pytest.CaptureFixture,
                                             text: str, message: str) -> None:
    table = tmp_path / "timings.csv"
    table.write_text(text)
    assert main(["fit", str(table)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and message in err and "timings.csv" in err
    assert not (tmp_path / "timings.fit.json").exists()


def test_run_and_demo_end_with_the_lines_fit_starts_with(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    import json
    import math

    import numpy as np

    from depthplan.cli import print_plan
    from depthplan.fitting.summary import format_summary, headline_lines
    from depthplan.records import RunResult, write_runs_jsonl

    # invented runs: T = 8000 K^-0.7 with 3 % noise at five depths, three seeds
    rng = np.random.default_rng(4)
    runs = [RunResult(depth=k, width=16, seed=s, learning_rate=0.05, status="converged",
                      iterations=int(8000 * k ** -0.7 * math.exp(rng.normal(0, 0.03))),
                      wall_seconds=math.nan, seconds_per_update=math.nan, final_train_loss=0.1,
                      final_train_accuracy=1.0, validation_accuracy=0.9, n_params=0,
                      extra={"network": {"n_inputs": 100, "n_classes": 5, "batch_size": 16,
                                         "widths": [16] * k}})
            for k in (1, 2, 4, 8, 16) for s in range(3)]
    write_runs_jsonl(runs, tmp_path / "runs.jsonl")
    print_plan(None, tmp_path)
    out = capsys.readouterr().out
    fit = json.loads((tmp_path / "fit.json").read_text())
    head = headline_lines(fit)
    assert out.splitlines()[1:] == head
    assert [line for line in head if line.startswith("Recommended depth:")]   # after "Not settled: ..." if any
    assert format_summary(fit).splitlines()[1:1 + len(head)] == head     # the same lines as `fit`


def test_demo_trains_over_a_committed_sample_that_has_no_store(write_yaml, tmp_path, monkeypatch, capsys):
    # A fresh checkout has results/demo/ (runs.csv, fit.json, the report) but not store.db, which is
    # not committed; `depthplan demo` must train it again instead of refusing the folder, while
    # `depthplan run` into the same kind of folder still refuses (tests/sweep/test_guards.py).
    import depthplan.cli as cli

    tiny_config = write_yaml("""
        name: tiny
        data: {source: digits}
        model: {width: 8}
        sweep: {depths: [1, 2, 3], seeds: 2}
        train: {learning_rate: 0.1, max_updates: 600, eval_every: 20, converge_when: {train_loss_below: 1.0}}
        probes: {n_points: 4, snr_window: 2}
        """)
    out = tmp_path / "demo"
    assert cli.main(["run", str(tiny_config), "--out", str(out), "-q", "--workers", "1"]) == 0
    (out / "store.db").unlink()
    monkeypatch.setattr(cli, "DEMO_CONFIG", tiny_config)
    capsys.readouterr()
    assert cli.main(["demo", "--out", str(out), "-q", "--workers", "1"]) == 0
    printed = capsys.readouterr().out
    assert "holds the committed demo results without their store; training the demo again" in printed
    assert "cells trained now" in printed and (out / "store.db").is_file() and (out / "report.html").is_file()

    # Trained again over its own sample, the demo reproduces it, and a clean checkout stays clean:
    # every file that changed only in timings, dates or paths keeps its committed bytes.
    from depthplan.sweep.sample import snapshot

    committed = snapshot(out)
    assert {"runs.csv", "runs.jsonl", "fit.json", "report.md", "report.html"} <= set(committed)
    (out / "store.db").unlink()
    assert cli.main(["demo", "--out", str(out), "-q", "--workers", "1"]) == 0
    printed = capsys.readouterr().out
    assert f"the runs reproduce the ones {out} held (apart from their timings)" in printed
    assert snapshot(out) == committed
    # A sample whose runs differ (one run's T edited) is news: the exports are rewritten from the store.
    runs = (out / "runs.csv").read_text(encoding="utf-8").splitlines()
    header, first = runs[0].split(","), runs[1].split(",")
    first[header.index("iterations")] = "1"
    (out / "runs.csv").write_text("\n".join([runs[0], ",".join(first), *runs[2:]]) + "\n", encoding="utf-8")
    assert cli.main(["demo", "--out", str(out), "-q", "--workers", "1"]) == 0
    assert f"the runs differ from the ones {out} held" in capsys.readouterr().out
    assert (out / "runs.csv").read_text(encoding="utf-8").splitlines()[1].split(",")[header.index("iterations")] != "1"


# --------------------------------------------------------------------------- model families

TINY_RESIDUAL = """
name: tiny-res
data: {source: iris}
model: {family: residual, width: 4, branch_scale: depth, norm: layer}
sweep: {depths: [1, 2, 3], seeds: 2}
train:
  learning_rate: {low: 0.01, high: 1.0, trials: 2, seeds: 1}
  max_updates: 40
  eval_every: 20
  converge_when: {train_loss_below: 2.0}
probes: {n_points: 4, snr_window: 3}
"""


def test_residual_sweep_with_tuning_through_run_and_report(write_yaml, tmp_path: Path,
                                                            capsys: pytest.CaptureFixture) -> None:
    import csv

    out = tmp_path / "r"
    assert main(["run", str(write_yaml(TINY_RESIDUAL)), "--out", str(out), "-q"]) == 0
    assert "tuned learning rates: K=1" in capsys.readouterr().out
    with (out / "runs.csv").open(newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == 6 and {r["lr_mode"] for r in rows} == {"tuned"}
    assert {(r["family"], r["model_options"]) for r in rows} == {("residual", "branch_scale=depth; norm=layer")}
    assert main(["report", str(out)]) == 0
    report = (out / "report.md").read_text()
    assert "| model family | residual (branch_scale=depth; norm=layer) |" in report
    assert "a residual network of width 4" in report


def test_a_factory_that_fails_is_one_line_before_any_training(write_yaml, tmp_path: Path,
                                                               capsys: pytest.CaptureFixture) -> None:
    (tmp_path / "broken_nets.py").write_text("def build(depth, n_inputs, n_classes):\n    return 'a network'\n")
    cfg = write_yaml("name: t\ndata: {source: iris}\nmodel: {factory: 'broken_nets:build'}\nsweep: {depths: [1, 3]}\n")
    for argv in (["check", str(cfg)], ["run", str(cfg), "--out", str(tmp_path / "r"), "-q"]):
        assert main(argv) == 2
        err = capsys.readouterr().err
        assert err.count("\n") == 1 and "Traceback" not in err
        assert "model.factory: broken_nets:build(depth=1, n_inputs=4, n_classes=3) returned a str, " \
               "expected a torch.nn.Module" in err
    assert not (tmp_path / "r").exists()                  # nothing created, nothing trained
