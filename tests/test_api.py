"""The Python interface (depthplan.api, docs/python-api.md): the documented examples run, and the
API's numbers equal the command line's on the same data."""
from __future__ import annotations

import doctest
import json
import re
import subprocess
import sys
import warnings
from pathlib import Path

import pytest

import depthplan
import depthplan.api

DOC = Path(__file__).resolve().parents[1] / "docs" / "python-api.md"
TABLE = {"depth": [2, 2, 4, 4, 8, 8, 16, 16, 32, 32],
         "iterations": [6100, 5900, 3900, 4050, 2600, 2500, 1650, 1700, 1100, 1080],
         "seed": [0, 1] * 5}


def _blocks(text: str) -> list[str]:
    return re.findall(r"```python\n(.*?)```", text, flags=re.S)


def test_every_example_in_the_python_api_guide_runs(tmp_path, monkeypatch, capsys):
    # The guide's blocks in order, in one namespace, in an empty folder (they train a tiny sweep).
    monkeypatch.chdir(tmp_path)
    blocks = _blocks(DOC.read_text(encoding="utf-8"))
    assert len(blocks) >= 6
    namespace: dict = {}
    for i, code in enumerate(blocks):
        exec(compile(code, f"{DOC.name} block {i + 1}", "exec"), namespace)
    out = capsys.readouterr().out
    assert "table row 2, column depth: must be a whole number >= 1, got 'eight'" in out
    assert (tmp_path / "scaling.png").stat().st_size > 1000
    assert (tmp_path / "results" / "tiny" / "report.html").is_file()
    assert len(namespace["runs"]) == 6


def test_docstring_examples_run():
    failures, tried = doctest.testmod(depthplan.api, optionflags=doctest.ELLIPSIS)
    assert tried >= 2 and failures == 0


def test_frame_mapping_and_csv_give_the_cli_s_fit(tmp_path):
    pandas = pytest.importorskip("pandas")
    csv_path = tmp_path / "t.csv"
    pandas.DataFrame(TABLE).to_csv(csv_path, index=False)
    from_map = depthplan.fit(TABLE)
    from_frame = depthplan.fit(pandas.DataFrame(TABLE))
    from_csv = depthplan.fit(csv_path)

    def strip(r):
        return {k: v for k, v in r.to_dict().items() if k != "source"}
    assert strip(from_map) == strip(from_frame) == strip(from_csv)
    # the command line on the same CSV, same defaults (400 bootstrap replicates, seed 0)
    proc = subprocess.run([sys.executable, "-m", "depthplan", "fit", str(csv_path)], capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr
    cli = json.loads((tmp_path / "t.fit.json").read_text())
    assert cli == from_csv.to_dict()
    assert from_csv.summary() in proc.stdout


def test_bad_data_raises_the_cli_s_error_naming_column_and_row():
    with pytest.raises(depthplan.DataError, match=r"^table row 1, column iterations: must be a whole number of updates"):
        depthplan.fit({"depth": [1, 2, 4], "iterations": [100, 50.5, 20]})
    with pytest.raises(depthplan.DataError, match="missing column iterations"):
        depthplan.fit({"depth": [1, 2, 4]})
    with pytest.raises(depthplan.DataError, match="a DataFrame or a mapping"):
        depthplan.fit([1, 2, 3])


def test_plot_draws_on_a_bare_figure_without_pyplot():
    code = ("import sys, depthplan\nfrom matplotlib.figure import Figure\n"
            f"r = depthplan.fit({TABLE!r}, bootstrap=50)\n"
            "fig = Figure(); ax = fig.add_subplot()\n"
            "assert r.plot(ax) is ax and len(ax.lines) + len(ax.collections) >= 3\n"
            "new = r.plot(); assert new.figure is not fig\n"
            "print('pyplot' if 'matplotlib.pyplot' in sys.modules else 'no pyplot')\n")
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.strip() == "no pyplot"


def test_import_and_fit_stay_free_of_torch_and_matplotlib():
    code = ("import sys, depthplan\n"
            f"depthplan.fit({TABLE!r}, bootstrap=20)\n"
            "print(sorted(m for m in ('torch', 'matplotlib') if m in sys.modules))\n")
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.strip() == "[]"


def test_all_lists_the_public_api_and_old_names_warn():
    assert {"fit", "run", "read_runs", "report", "FitResult"} <= set(depthplan.__all__)
    assert not [n for n in depthplan.__all__ if n.startswith("_") and n != "__version__"]
    for name in depthplan.__all__:
        assert getattr(depthplan, name) is not None
    assert "fit_runs" not in depthplan.__all__ and "fit_runs" not in dir(depthplan)
    with pytest.warns(DeprecationWarning, match="import it from depthplan.fitting"):
        old = depthplan.fit_runs
    from depthplan.fitting import fit_runs
    assert old is fit_runs
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        depthplan.fit    # noqa: B018 - the public names do not warn


def test_read_runs_without_pandas_names_the_extra(tmp_path, monkeypatch):
    path = tmp_path / "t.csv"
    path.write_text("depth,iterations\n1,100\n2,60\n")
    monkeypatch.setitem(sys.modules, "pandas", None)          # as if pandas were not installed
    with pytest.raises(depthplan.DepthplanError, match=r"pip install 'depthplan\[notebook\]'"):
        depthplan.read_runs(path)


def test_run_checks_a_mapping_with_the_config_s_messages(tmp_path):
    bad = {"name": "x", "data": {"source": "digits"}, "sweep": {"depths": [1, "two"], "seeds": 1}}
    with pytest.raises(depthplan.ConfigError, match=r"sweep\.depths\[1\]"):
        depthplan.run(bad, out=tmp_path / "x", progress=False)
