"""The written reports the tests of tests/reporting read: each is written once per test session.

Inputs come from report_data.py (a stored demo folder, an invented measurements table, an
invented folder with several rate groups) and fitting_data.sweep (invented runs at several proxy
widths, for the transfer section). Tests only read these reports; a test that changes a folder
makes its own.
"""
from __future__ import annotations

import json
import shutil
import sys
from pathlib import Path

import pytest

from depthplan.records import write_runs_csv
from depthplan.reporting.write import write_report

from report_data import FIXTURE, N_BOOT, write_rates_folder, write_table

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "fitting"))
from fitting_data import sweep  # noqa: E402


@pytest.fixture(scope="session")
def folder_report(tmp_path_factory):
    folder = tmp_path_factory.mktemp("stored") / "demo"
    shutil.copytree(FIXTURE, folder)
    return folder, write_report(folder, n_boot=N_BOOT)


@pytest.fixture(scope="session")
def table_report(tmp_path_factory):
    table = write_table(tmp_path_factory.mktemp("table") / "timings.csv")
    return table, write_report(table, n_boot=N_BOOT)


@pytest.fixture(scope="session")
def rates_report(tmp_path_factory):
    folder = write_rates_folder(tmp_path_factory.mktemp("rates") / "invented")
    return folder, write_report(folder, n_boot=N_BOOT)


@pytest.fixture(scope="session")
def transfer_report(tmp_path_factory):
    """Invented runs at widths 16, 32, 64 and a held-out 128 (corner K*(W) = 2 W^0.5), target width 256."""
    folder = tmp_path_factory.mktemp("sized")
    write_runs_csv(sweep([16, 32, 64]) + sweep([128], seed=9), folder / "runs.csv")
    (folder / "sweep.json").write_text(json.dumps({
        "name": "sized", "eval_every": 20, "max_updates": 40000,
        "verify": {"width": 128, "train_rows": None, "prediction": None},
        "target": {"width": 256, "train_rows": None, "n_params": None}}))
    return write_report(folder, n_boot=60)
