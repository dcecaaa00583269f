"""Hostile input: passwords in storage URLs never reach a file or a message; YAML bombs are refused.

Sources of the checks:
- URL forms: RFC 3986 section 3.2.1 (`user:password@host` userinfo) and the libpq
  connection-URI documentation (PostgreSQL manual, "Connection Strings"), which
  accepts `password` and `sslpassword` as query parameters. The redaction rules themselves
  (urls.py): tests/test_urls.py.
- YAML bombs: the "billion laughs" entity-expansion attack (OWASP, "XML External
  Entity / Billion Laughs"), written here with YAML anchors and aliases.
- One short error line, exit status 2, nothing stored lost: this project's CLI
  contract (depthplan/errors.py, tests/test_cli.py).
"""
from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from depthplan.checks import SHOW_MAX
from depthplan.config import MAX_ALIASES, load_config
from depthplan.errors import ConfigError, StoreError
from depthplan.sweep.storage import STORAGE_ENV, store_error

# SQLAlchemy 2.1 maps a bare `postgresql://` to psycopg 3; name psycopg2 (the driver installed here)
PG = "postgresql+psycopg2"


# --------------------------------------------------------------------------- a real driver error
def test_a_real_driver_error_carries_no_password() -> None:
    pytest.importorskip("psycopg2")
    sqlalchemy = pytest.importorskip("sqlalchemy")
    from depthplan.sweep.storage import open_rdb_storage

    for url, secrets in [(f"{PG}://u:p%40ss@127.0.0.1:1/db?password=hunter2", ("hunter2", "p@ss", "p%40ss")),
                         (f"{PG}://u:pa@ss@127.0.0.1:1/db?sslpassword=hunter2", ("hunter2", "pa@ss", "ss@"))]:
        # the driver's own message, through the same mapping every store failure takes
        try:
            sqlalchemy.create_engine(url).connect()
        except sqlalchemy.exc.SQLAlchemyError as exc:
            mapped = str(store_error("cannot open the sweep store", url, exc))
        else:
            pytest.fail("nothing should listen on port 1")
        with pytest.raises(StoreError) as info:
            open_rdb_storage(url)
        for text in (mapped, str(info.value)):
            assert "127.0.0.1" in text and "\n" not in text
            for secret in secrets:
                assert secret not in text, (secret, text)


def _run_cli(args: list[str], cwd: Path, env_extra: dict[str, str] | None = None) -> subprocess.CompletedProcess:
    env = {k: v for k, v in os.environ.items() if k != STORAGE_ENV}
    env.update(env_extra or {})
    return subprocess.run([sys.executable, "-m", "depthplan", *args], cwd=cwd, env=env, check=False,
                          capture_output=True, text=True, timeout=60)


@pytest.mark.parametrize("how", ["option", "env"])
def test_cli_run_on_a_closed_port_names_no_password(tiny_config: Path, tmp_path: Path, how: str) -> None:
    pytest.importorskip("psycopg2")
    url = f"{PG}://u:pa@ss@127.0.0.1:1/db?Password=hunter2&sslpassword=s3cr3t"
    out = tmp_path / "r"
    out.mkdir()
    (out / "keep.txt").write_text("stored earlier\n")
    args = ["run", str(tiny_config), "--out", str(out), "-q"]
    proc = (_run_cli(args + ["--storage", url], tmp_path) if how == "option"
            else _run_cli(args, tmp_path, {STORAGE_ENV: url}))
    assert proc.returncode == 2
    assert proc.stderr.startswith("depthplan: cannot open the sweep store") and proc.stderr.count("\n") == 1
    assert "Traceback" not in proc.stderr
    for secret in ("hunter2", "s3cr3t", "pa@ss", "ss@"):
        assert secret not in proc.stdout + proc.stderr, secret
    assert (out / "keep.txt").read_text() == "stored earlier\n"


def test_config_storage_with_a_query_secret_is_refused(write_yaml) -> None:
    p = write_yaml('name: t\noutput: {storage: "postgresql://h/db?sslmode=require&Token=abc123"}\n')
    with pytest.raises(ConfigError, match="output.storage: must not hold credentials") as info:
        load_config(p)
    assert "abc123" not in str(info.value)


def test_sweep_json_records_the_redacted_url(tiny_config: Path, tmp_path: Path) -> None:
    """The sidecar writer stores `redact(url)`; a sqlite URL with a query stays readable."""
    from depthplan.cli import main

    out = tmp_path / "r"
    url = f"sqlite:///{tmp_path / 'store.db'}"
    assert main(["run", str(tiny_config), "--out", str(out), "--storage", url, "-q"]) == 0
    assert json.loads((out / "sweep.json").read_text())["storage"] == url


# --------------------------------------------------------------------------- YAML bombs
def _laughs(levels: int, fan_out: int) -> str:
    """Each anchor lists `fan_out` aliases of the one before: fan_out**levels values once expanded."""
    lines = ["name: t", "l0: &l0 [" + ",".join(["lol"] * fan_out) + "]"]
    lines += [f"l{i}: &l{i} [" + ",".join([f"*l{i - 1}"] * fan_out) + "]" for i in range(1, levels + 1)]
    return "\n".join(lines) + "\n"


@pytest.mark.parametrize("levels, fan_out", [
    (8, 9),    # 72 aliases, 9**9 values: stopped by the expanded size
    (11, 10),  # 110 aliases: stopped by the alias count
])
def test_yaml_bombs_are_refused_in_one_short_line(tmp_path: Path, levels: int, fan_out: int) -> None:
    text = _laughs(levels, fan_out)
    assert len(text) < 700
    bomb = tmp_path / "bomb.yaml"
    bomb.write_text(text)
    proc = _run_cli(["check", str(bomb)], tmp_path)
    assert proc.returncode == 2
    assert proc.stderr.count("\n") == 1 and len(proc.stderr) < 300
    assert str(bomb) in proc.stderr and "refused" in proc.stderr and "Traceback" not in proc.stderr
    if levels * fan_out > MAX_ALIASES:
        assert f"more than {MAX_ALIASES} aliases" in proc.stderr


def test_self_reference_deep_nesting_and_size_are_refused(write_yaml) -> None:
    cases = {"self.yaml": ("name: t\nsweep: &s {depths: *s}\n", "contains it"),
             "deep.yaml": ("name: " + "[" * 50_000 + "\n", "nested too deeply"),
             "big.yaml": ("name: t\n" + "# padding\n" * 110_000, "larger than 1 MB")}
    for name, (text, what) in cases.items():
        with pytest.raises(ConfigError, match=what) as info:
            load_config(write_yaml(text, name))
        assert name in str(info.value) and len(str(info.value)) < 300


def test_a_few_aliases_still_work(write_yaml) -> None:
    p = write_yaml("name: t\nsweep: {depths: &d [1, 2], seeds: 2}\nprobes: {n_points: 6}\nx_unused: *d\n")
    with pytest.raises(ConfigError, match="unknown key 'x_unused'"):
        load_config(p)
    ok = write_yaml("name: t\nsweep: {depths: &d [1, 2]}\nmodel: {width: [8, 8]}\n", "ok.yaml")
    assert load_config(ok).sweep.depths == (1, 2)


# --------------------------------------------------------------------------- long values
def test_an_overlong_bad_value_is_echoed_shortened(write_yaml) -> None:
    p = write_yaml("name: t\nsweep: {depths: [1, '" + "x" * 5000 + "']}\nmodel: {activation: "
                   + "y" * 3000 + "}\n" + "z" * 500 + ": 1\n")
    with pytest.raises(ConfigError) as info:
        load_config(p)
    text = str(info.value)
    assert text.count("…") == 3 and len(text) < 600
    for run in ("x" * (SHOW_MAX + 1), "y" * (SHOW_MAX + 1), "z" * (SHOW_MAX + 1)):
        assert run not in text
    assert "sweep.depths[1]: must be a positive integer, got 'xxx" in text


# --------------------------------------------------------------------------- the operating system says no
# Every such failure reaches the user as one line naming the path (or URL) and what to do, exit
# status 1 at run time and 2 for a usage mistake, no traceback, no temporary file left behind.
FIXTURE = Path(__file__).resolve().parent / "data" / "report-folder"


def _one_line(proc: subprocess.CompletedProcess, code: int) -> str:
    assert proc.returncode == code, proc.stdout + proc.stderr
    assert proc.stderr.count("\n") == 1 and "Traceback" not in proc.stderr, proc.stderr
    return proc.stderr


def test_out_pointing_at_a_file_and_a_sqlite_url_without_file(tiny_config: Path, tmp_path: Path) -> None:
    a_file = tmp_path / "notes.txt"
    a_file.write_text("mine\n")
    err = _one_line(_run_cli(["run", str(tiny_config), "--out", str(a_file), "-q"], tmp_path), 2)
    assert str(a_file) in err and "not a folder" in err and "--out DIR" in err
    assert a_file.read_text() == "mine\n"
    for url in ("sqlite:///", "sqlite://", "sqlite:///:memory:"):
        err = _one_line(_run_cli(["run", str(tiny_config), "--out", str(tmp_path / "r"), "--storage", url, "-q"],
                                 tmp_path), 2)
        assert f"storage {url}: names no database file" in err


def _read_only_folder(path: Path, fill_from: Path | None = None):
    """Make `path` a folder this process cannot write: chmod for a normal user; as root (which
    chmod does not stop) a tmpfs mounted read-only. Returns the undo, or skips saying why."""
    path.mkdir()
    if fill_from is not None:
        for f in fill_from.iterdir():
            shutil.copy(f, path / f.name)
    if os.geteuid() != 0:
        path.chmod(0o555)
        return lambda: path.chmod(0o755)
    if shutil.which("mount") is None:
        pytest.skip("running as root, where chmod does not stop writes, and `mount` is missing for a read-only tmpfs")
    proc = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=4m", "tmpfs", str(path)], capture_output=True, text=True)
    if proc.returncode:
        pytest.skip(f"running as root, where chmod does not stop writes, and a tmpfs cannot be mounted: {proc.stderr.strip()}")
    for f in (fill_from.iterdir() if fill_from else ()):
        shutil.copy(f, path / f.name)
    subprocess.run(["mount", "-o", "remount,ro", str(path)], check=True)
    return lambda: subprocess.run(["umount", str(path)], check=False)


@pytest.mark.parametrize("command", ["run", "fit", "report"])
def test_a_read_only_folder_is_one_line(tiny_config: Path, tmp_path: Path, command: str) -> None:
    folder = tmp_path / "locked"
    undo = _read_only_folder(folder, None if command == "run" else FIXTURE)
    try:
        before = sorted(p.name for p in folder.iterdir())
        args = {"run": ["run", str(tiny_config), "--out", str(folder / "res"), "-q"],
                "fit": ["fit", str(folder), "--bootstrap", "20"],
                "report": ["report", str(folder)]}[command]
        err = _one_line(_run_cli(args, tmp_path), 1)
        assert str(folder) in err and ("writable" in err or "--out DIR" in err)
        assert sorted(p.name for p in folder.iterdir()) == before       # nothing half-written
    finally:
        undo()


def test_a_full_disk_while_exporting_is_one_line_and_leaves_no_temporary_file(
        tiny_config: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture) -> None:
    import errno

    from depthplan.cli import main
    from depthplan.sweep.storage import SweepStore, local_url

    out = tmp_path / "res"
    real = Path.write_bytes

    def write_bytes(self: Path, data: bytes) -> int:
        if self.name == "runs.jsonl.tmp":                 # half the file reaches the disk, then it is full
            real(self, data[: len(data) // 2])
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        return real(self, data)

    monkeypatch.setattr(Path, "write_bytes", write_bytes)
    assert main(["run", str(tiny_config), "--out", str(out), "-q", "--workers", "1"]) == 1
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and f"{out / 'runs.jsonl'}: No space left on device; free some disk space" in err
    assert not list(out.glob("*.tmp"))
    assert len(SweepStore(local_url(out), "tiny").results()) == 4   # the trained cells are stored
    monkeypatch.setattr(Path, "write_bytes", real)
    assert main(["run", str(tiny_config), "--out", str(out), "-q", "--workers", "1"]) == 0
    assert "0 cells trained now" in capsys.readouterr().out


def test_a_store_failure_mid_sweep_is_one_line_naming_the_store(
        tiny_config: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture) -> None:
    from sqlalchemy.exc import OperationalError

    from depthplan.cli import main
    from depthplan.sweep.storage import SweepStore

    def record(self, claim, results):
        raise OperationalError("UPDATE trials ...", {}, Exception("database or disk is full"))

    monkeypatch.setattr(SweepStore, "record", record)
    out = tmp_path / "res"
    assert main(["run", str(tiny_config), "--out", str(out), "-q", "--workers", "1"]) == 1
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "Traceback" not in err
    assert f"the sweep store at sqlite:///{out / 'store.db'} failed" in err and "disk is full" in err
