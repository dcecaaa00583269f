"""A sweep refuses what would mix, leak or lose data: changed data, a second sweep in a folder,
a lost store beside its exports, a plan too large to start unasked, a cell too large to allocate.

Sources of the checks: SHA-256 (FIPS 180-4) through Python's hashlib, compared here with the
`sha256sum`-style digest of the same bytes computed independently; the one-line refusal with
exit status 2 and nothing stored lost is this project's CLI contract (depthplan/errors.py).
The limits (10,000 seed runs, an hour) are the project's choice; the trainer speeds behind the
time estimate are DEVELOPERS.md's benchmark (part 1).
"""
from __future__ import annotations

import hashlib
import json
import subprocess
import sys
from pathlib import Path

import pytest

from depthplan.cli import main
from depthplan.config import load_config
from depthplan.errors import ConfigError
from depthplan.sweep import guards
from depthplan.sweep.run import plan_cells, run_sweep
from depthplan.sweep.storage import SweepStore, local_url

CSV_SWEEP = """
name: table
data: {source: csv, path: rows.csv, label: label}
model: {width: 8}
sweep: {depths: [1, 2], seeds: 2}
train: {learning_rate: 0.05, max_updates: 60, eval_every: 20, converge_when: {train_loss_below: 0.5}}
probes: {n_points: 6, snr_window: 4}
"""


def _write_rows(path: Path, shift: float = 0.0) -> None:
    """Invented rows: two features, the label is whether their sum is positive."""
    lines = ["a,b,label"]
    for i in range(60):
        a, b = (i % 7) - 3.0 + shift, (i % 5) - 2.0
        lines.append(f"{a},{b},{int(a + b > 0)}")
    path.write_text("\n".join(lines) + "\n")


def _cli(*args: str, cwd: Path) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "depthplan", *args], cwd=cwd, capture_output=True,
                          text=True, timeout=120)


def _one_line(proc: subprocess.CompletedProcess, code: int) -> str:
    assert proc.returncode == code, proc.stderr
    assert proc.stderr.count("\n") == 1 and "Traceback" not in proc.stderr, proc.stderr
    return proc.stderr


def test_file_hash_is_the_sha256_of_the_bytes(tmp_path: Path) -> None:
    p = tmp_path / "x.bin"
    p.write_bytes(b"abc")
    # FIPS 180-4, appendix A.1: SHA-256("abc")
    assert guards.file_sha256(p) == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    big = bytes(range(256)) * 9000                                 # over one 1 MB block
    p.write_bytes(big)
    assert guards.file_sha256(p) == hashlib.sha256(big).hexdigest()


def test_data_edited_between_runs_is_refused_naming_the_file(write_yaml, tmp_path: Path) -> None:
    config = write_yaml(CSV_SWEEP)
    rows = tmp_path / "rows.csv"
    _write_rows(rows)
    out = tmp_path / "res"
    assert main(["run", str(config), "--out", str(out), "-q", "--workers", "1"]) == 0
    before = (out / "runs.csv").read_text()
    stored = SweepStore(local_url(out), "table").meta()["data_sha256"]
    assert stored == {str(rows): hashlib.sha256(rows.read_bytes()).hexdigest()}
    assert json.loads((out / "sweep.json").read_text())["data_sha256"] == stored
    _write_rows(rows, shift=0.5)                                    # same shape, other numbers
    err = _one_line(_cli("run", str(config), "--out", str(out), "-q", cwd=tmp_path), 2)
    assert f"data file {rows} changed" in err and "--out DIR" in err
    assert (out / "runs.csv").read_text() == before
    assert len(SweepStore(local_url(out), "table").results()) == 4
    # a worker on the planned sweep refuses the changed file too
    err = _one_line(_cli("worker", "--storage", local_url(out), "--study", "table", cwd=tmp_path), 2)
    assert f"data file {rows} changed" in err
    _write_rows(rows)                                               # restored: the sweep resumes
    assert main(["run", str(config), "--out", str(out), "-q", "--workers", "1"]) == 0


def test_a_store_from_before_data_hashes_resumes(write_yaml, tmp_path: Path) -> None:
    config = write_yaml(CSV_SWEEP)
    _write_rows(tmp_path / "rows.csv")
    cfg = load_config(config)
    out = tmp_path / "res"
    run_sweep(cfg, out=out, show_progress=False)
    store = SweepStore(local_url(out), "table")
    store.study._storage.set_study_user_attr(store._id, "data_sha256", None)   # as an older store had none
    again = run_sweep(cfg, out=out, show_progress=False)
    assert again.n_trained == 0 and again.n_runs == 4
    assert SweepStore(local_url(out), "table").meta()["data_sha256"]            # fingerprinted now


def test_another_sweep_name_in_a_used_folder_is_refused(tiny_config: Path, tmp_path: Path) -> None:
    out = tmp_path / "res"
    run_sweep(load_config(tiny_config), out=out, show_progress=False)
    kept = {f: (out / f).read_text() for f in ("runs.csv", "config.yaml", "sweep.json")}
    other = tiny_config.with_name("other.yaml")
    other.write_text(tiny_config.read_text().replace("name: tiny", "name: tiny2"))
    err = _one_line(_cli("run", str(other), "--out", str(out), "-q", cwd=tmp_path), 2)
    assert "already holds sweep 'tiny', not 'tiny2'" in err and "--out DIR" in err
    assert {f: (out / f).read_text() for f in kept} == kept
    import optuna

    assert [s.study_name for s in optuna.get_all_study_summaries(local_url(out))] == ["tiny"]


@pytest.mark.parametrize("damage", ["empty", "missing"])
def test_a_lost_store_beside_exports_is_not_retrained(tiny_config: Path, tmp_path: Path, damage: str) -> None:
    out = tmp_path / "res"
    run_sweep(load_config(tiny_config), out=out, show_progress=False)
    before = (out / "runs.csv").read_text()
    if damage == "empty":
        (out / "store.db").write_bytes(b"")
    else:
        (out / "store.db").unlink()
    err = _one_line(_cli("run", str(tiny_config), "--out", str(out), "-q", cwd=tmp_path), 2)
    assert f"store.db is {damage} but" in err and "holds 4 runs" in err and "backup" in err
    assert (out / "runs.csv").read_text() == before


def test_a_garbage_store_is_one_line(tiny_config: Path, tmp_path: Path) -> None:
    out = tmp_path / "res"
    out.mkdir()
    (out / "store.db").write_bytes(b"this is not a database file " * 40)
    err = _one_line(_cli("run", str(tiny_config), "--out", str(out), "-q", cwd=tmp_path), 2)
    assert str(out / "store.db") in err and "not a database" in err and "--out DIR" in err


def test_a_large_plan_asks_for_yes(write_yaml, tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    # 101 depths x 100 seeds = 10,100 seed runs, over the 10,000 limit
    depths = ", ".join(str(k) for k in range(1, 102))
    config = write_yaml(f"name: big\ndata: {{source: digits}}\nmodel: {{width: 8}}\nsweep: {{depths: [{depths}], seeds: 100}}\n")
    out = tmp_path / "res"
    assert main(["run", str(config), "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "10,100 seed runs" in err and "pass --yes" in err
    assert not out.exists()                                         # nothing was started
    assert main(["check", str(config)]) == 0
    assert "10,100 seed runs" in capsys.readouterr().out


def test_plan_size_counts_runs_and_bounds_updates(tiny_config: Path) -> None:
    cfg = load_config(tiny_config)
    size = guards.plan_size(cfg, plan_cells(cfg), workers=2)
    assert (size.n_cells, size.n_seed_runs, size.max_seed_updates) == (2, 4, 4 * 60)
    # DEVELOPERS.md part 1 at width 32: about 16 us per seed-update at K=1, 61 us at K=8
    assert guards.seconds_per_update(cfg, 1) == pytest.approx(16.3e-6)
    assert guards.seconds_per_update(cfg, 8) == pytest.approx(60.4e-6)
    assert not size.large


def test_a_cell_too_large_for_memory_is_refused_before_training(write_yaml, tmp_path: Path) -> None:
    config = write_yaml("name: wide\ndata: {source: digits}\nmodel: {width: 10000000}\nsweep: {depths: [1, 2], seeds: 2}\n")
    cfg = load_config(config)
    # depth 2: (1+1)*1e7 + (1e7+1)*1e7 + (1e7+1)*2 weights per seed, 2 seeds, 3 copies of 4 bytes
    assert guards.cell_bytes_at_least(cfg, 2, 2) == 3 * 4 * 2 * (2 * 10**7 + (10**7 + 1) * 10**7 + (10**7 + 1) * 2)
    with pytest.raises(ConfigError, match=r"model.width: a cell of depth 2 with 2 seeds needs at least 2.4 PB"):
        guards.check_memory(cfg, plan_cells(cfg), total=25 * 10**9)
    err = _one_line(_cli("run", str(config), "--out", str(tmp_path / "res"), cwd=tmp_path), 2)
    assert "model.width" in err and not (tmp_path / "res").exists()


def test_default_folder_is_beside_the_sweep_file(tiny_config: Path, tmp_path: Path) -> None:
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    proc = _cli("check", str(tiny_config), cwd=elsewhere)
    assert proc.returncode == 0, proc.stderr
    assert f"output   {tiny_config.parent / 'results' / 'tiny'}" in proc.stdout
    assert load_config(tiny_config).output.dir == str(tiny_config.parent / "results" / "tiny")
