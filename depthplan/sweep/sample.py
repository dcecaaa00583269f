"""Keep a committed results sample as it is when a rerun reproduces it.

A fresh checkout ships `results/demo/` without its store, so `depthplan demo` trains it again. The
trainer is deterministic: on the same CPU and software the runs come out the same, and only what
the clock and the checkout's place give changes (wall times and seconds per update, the dates in
the provenance and the stored prediction, the checkout's absolute path). Rewriting the files for
that would leave a clean checkout looking modified, so:

1. when the new runs equal the committed ones apart from their timings, the committed `runs.csv`
   and `runs.jsonl` are put back before the fit, so every figure drawn from them is the committed one;
2. after the report, a file whose new text equals the committed text with dates, the checkout's
   path, the commit of the code and the report's note on how fit.json came about masked keeps its
   committed bytes.

A file that differs in anything else (a run, a fitted number, a figure, another machine's facts)
is written anew: that difference is news.
"""
from __future__ import annotations

import csv
import io
import json
import re
from pathlib import Path

from ..records import write_bytes_atomic

#: Run fields that the clock sets, not the training.
TIMING_FIELDS = ("wall_seconds", "seconds_per_update")
#: The files of a results folder a sample commits (the store is never committed).
SAMPLE_FILES = ("runs.csv", "runs.jsonl", "tuning.csv", "fit.json", "sweep.json", "config.yaml",
                "report.md", "report.html")

_DATE = re.compile(r"\d{4}-\d{2}-\d{2}[T ]\d{2}:\d{2}(?::\d{2}(?:\.\d+)?)?(?:Z|[+-]\d{2}:?\d{2}| UTC)?")
#: An absolute path up to the checkout's results/ or configs/ folder (also inside a sqlite:/// URL).
_CHECKOUT = re.compile(r"/[^\s\"'`|<>()]*?(?=/(?:results|configs)/)")
#: The commit of the code that wrote the report (a version, not a result).
_COMMIT = re.compile(r"\b[0-9a-f]{40}\b(?: \(with uncommitted changes\))?")
#: The report's note on how fit.json came about (reused, or refitted and why): the process, not the result.
_FIT_NOTE = re.compile(r"(?:reused fit\.json: it is newer than the runs|fitted now \(\d+ bootstrap resamples\) because [^;|<]*)")


def snapshot(folder: Path) -> dict[str, bytes]:
    """The bytes of every sample file in `folder` (figures included), by path relative to it."""
    folder = Path(folder)
    paths = [folder / name for name in SAMPLE_FILES]
    if (folder / "figures").is_dir():
        paths += sorted(p for p in (folder / "figures").iterdir() if p.suffix in (".png", ".svg"))
    return {p.relative_to(folder).as_posix(): p.read_bytes() for p in paths if p.is_file()}


def _runs_without_timings(name: str, data: bytes) -> list[dict]:
    text = data.decode("utf-8")
    rows = (list(csv.DictReader(io.StringIO(text))) if name.endswith(".csv")
            else [json.loads(line) for line in text.splitlines() if line.strip()])
    return [{k: v for k, v in row.items() if k not in TIMING_FIELDS} for row in rows]


def same_runs(old: bytes, new: bytes, name: str = "runs.csv") -> bool:
    """Whether two exports of runs (`runs.csv` or `runs.jsonl` bytes) differ at most in their timings."""
    try:
        return _runs_without_timings(name, old) == _runs_without_timings(name, new)
    except (UnicodeDecodeError, ValueError, csv.Error):
        return False


def restore_reproduced_runs(folder: Path, snap: dict[str, bytes]) -> bool:
    """Put the committed run exports back when the new ones reproduce them; True when they did."""
    folder = Path(folder)
    names = [n for n in ("runs.csv", "runs.jsonl") if n in snap]
    if not names or not all((folder / n).is_file() for n in names):
        return False
    if not all(same_runs(snap[n], (folder / n).read_bytes(), n) for n in names):
        return False
    for n in names:
        write_bytes_atomic(folder / n, snap[n])
    return True


def _masked(data: bytes) -> bytes | None:
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError:
        return None
    for pattern, token in ((_DATE, "<date>"), (_CHECKOUT, "<checkout>"), (_FIT_NOTE, "<fit note>"), (_COMMIT, "<commit>")):
        text = pattern.sub(token, text)
    return text.encode("utf-8")


def keep_unchanged(folder: Path, snap: dict[str, bytes]) -> list[str]:
    """Write back the committed bytes of every file that changed only in dates or the checkout's path.

    Returns the names of the files whose new bytes differed but were kept as committed.
    """
    folder = Path(folder)
    kept = []
    for name, old in snap.items():
        path = folder / name
        if not path.is_file():
            continue
        new = path.read_bytes()
        if new == old:
            continue
        m_old, m_new = _masked(old), _masked(new)
        if m_old is not None and m_old == m_new:
            write_bytes_atomic(path, old)
            kept.append(name)
    return kept
