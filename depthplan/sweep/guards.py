"""What a sweep checks before it touches a results folder, so that nothing mixes, leaks or is lost.

- The data's fingerprint: a SHA-256 of every data file's bytes, stored with the sweep, so a
  data file edited between a crash and the resume is refused instead of mixing two datasets.
  Built-in sources (the synthetic scenario, scikit-learn's sets) are fixed by their source name
  and generator parameters, which the config fingerprint already holds.
- One folder, one sweep: a config of another name run into a used folder is refused.
- A store that is missing, empty or unreadable beside exported runs is refused, not retrained.
- The plan's size: seed runs, an upper bound of seed-updates and a rough time, and the memory a
  cell needs at the very least (a width too large to allocate is refused before training).

Never imports torch.
"""
from __future__ import annotations

import hashlib
import json
import logging
import os
from dataclasses import dataclass
from pathlib import Path

from ..config import SweepFile
from ..errors import ConfigError, StoreError
from ..records import CellSpec

log = logging.getLogger(__name__)

#: A plan above either limit asks for `--yes` before it starts.
MAX_SEED_RUNS = 10_000
MAX_ESTIMATE_S = 3600.0


# --------------------------------------------------------------------------- the data
def file_sha256(path: Path) -> str:
    """SHA-256 of a file's bytes, read in 1 MB blocks (hex)."""
    h = hashlib.sha256()
    with Path(path).open("rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def data_hashes(cfg: SweepFile) -> dict[str, str]:
    """Data file -> SHA-256 of its bytes; empty for built-in sources (fixed by the config itself)."""
    out = {}
    for path in (cfg.data.path, cfg.data.label_path):
        if path and cfg.data.source in ("csv", "npz", "npy"):
            try:
                out[path] = file_sha256(Path(path))
            except OSError as exc:
                raise ConfigError(f"data file {path}: cannot be read ({exc.strerror or type(exc).__name__})") from None
    return out


def check_data(stored: dict[str, str] | None, now: dict[str, str], where: str) -> None:
    """Refuse when a data file's bytes differ from those the sweep's stored runs were trained on.

    Raises:
        StoreError: naming the changed file and what to do.
    """
    for path, digest in (stored or {}).items():
        if path in now and now[path] != digest:
            raise StoreError(f"data file {path} changed since the runs in {where} were trained on it "
                             f"(SHA-256 {digest[:12]}… then, {now[path][:12]}… now); restore the file to "
                             "finish this sweep, or pass --out DIR to sweep the new data in a new folder")


# --------------------------------------------------------------------------- the folder
def check_one_sweep(folder: Path, name: str, names_in_store: list[str] | None) -> None:
    """Refuse to run sweep `name` into a folder that already holds another sweep.

    Args:
        names_in_store: studies in the folder's own store (None when the store is elsewhere).
    """
    others = sorted({n.split(":tune:")[0] for n in names_in_store or []} - {name})
    facts = folder / "sweep.json"
    if not others and facts.is_file():
        try:
            held = json.loads(facts.read_text(encoding="utf-8")).get("name")
        except (OSError, ValueError, AttributeError):
            held = None
        if isinstance(held, str) and held != name:
            others = [held]
    if others:
        raise StoreError(f"{folder} already holds sweep '{others[0]}', not '{name}'; one folder holds one "
                         f"sweep: pass --out DIR for '{name}', or set name: {others[0]} to finish that one")


def check_store_beside_exports(folder: Path, store_file: Path) -> None:
    """Refuse to start over when the folder's store is missing or empty but exported runs remain."""
    runs = folder / "runs.csv"
    try:
        n_rows = max(0, len(runs.read_text(encoding="utf-8").splitlines()) - 1) if runs.is_file() else 0
    except (OSError, UnicodeDecodeError):
        n_rows = 0
    if not n_rows:
        return
    state = "missing" if not store_file.exists() else ("empty" if store_file.stat().st_size == 0 else "")
    if state:
        raise StoreError(f"{store_file} is {state} but {runs} holds {n_rows} runs exported from it; restore "
                         "store.db from a backup to resume, or move the folder away (or pass --out DIR) to start over")


# --------------------------------------------------------------------------- the plan's size
#: Seconds per seed-update of the batched trainer at width 32 on one core, as a function of depth:
#: about 16 us at 1 hidden layer, 35 us at 4 and 61 us at 8 (DEVELOPERS.md, benchmark part 1).
_US_FIXED, _US_PER_LAYER = 10.0, 6.3


def seconds_per_update(cfg: SweepFile, depth: int) -> float:
    """A rough time of one seed-update at `depth` on one core (wider layers cost their products)."""
    widths = cfg.model.widths(depth)
    scale = sum(max(1.0, (w / 32) ** 2) for w in widths) / max(1, len(widths))
    return (_US_FIXED + _US_PER_LAYER * depth * scale) * 1e-6


@dataclass(frozen=True)
class PlanSize:
    n_cells: int
    n_seed_runs: int
    max_seed_updates: int          # every run to its budget: an upper bound
    estimate_s: float              # that bound's rough time on `workers` cores
    workers: int

    def text(self) -> str:
        t = self.estimate_s
        when = f"{t / 3600:.1f} h" if t >= 3600 else (f"{t / 60:.0f} min" if t >= 60 else f"{t:.0f} s")
        return (f"{self.n_cells} cells, {self.n_seed_runs:,} seed runs, at most {self.max_seed_updates:,} "
                f"seed-updates (up to about {when} on {self.workers} worker{'s' if self.workers > 1 else ''})")

    @property
    def large(self) -> bool:
        return self.n_seed_runs > MAX_SEED_RUNS or self.estimate_s > MAX_ESTIMATE_S


def plan_size(cfg: SweepFile, cells: list[CellSpec], workers: int) -> PlanSize:
    """Count the plan's seed runs and bound its seed-updates and time."""
    runs = sum(len(c.seeds) for c in cells)
    seconds = sum(len(c.seeds) * cfg.train.max_updates * seconds_per_update(cfg, c.depth) for c in cells)
    return PlanSize(len(cells), runs, runs * cfg.train.max_updates, seconds / max(1, workers), workers)


def confirm_size(size: PlanSize, yes: bool) -> None:
    """Refuse a large plan (over MAX_SEED_RUNS runs or MAX_ESTIMATE_S) unless the user said --yes."""
    if size.large and not yes:
        raise ConfigError(f"a large plan: {size.text()}; pass --yes to start it, or sweep fewer depths, "
                          "seeds or learning rates")


def memory_bytes() -> int | None:
    """This machine's physical memory, or None when unknown."""
    try:
        return os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (ValueError, OSError, AttributeError):
        return None


def cell_bytes_at_least(cfg: SweepFile, depth: int, n_seeds: int) -> int:
    """A lower bound of a cell's memory: its seeds' weights three times (weights, gradients,
    initial copy) in float32, with one input feature and two classes, the fewest there can be."""
    sizes = (1, *cfg.model.widths(depth), 2)
    params = sum((a + 1) * b for a, b in zip(sizes, sizes[1:]))
    return 3 * 4 * n_seeds * params


def check_memory(cfg: SweepFile, cells: list[CellSpec], total: int | None = None) -> None:
    """Refuse a plan with a cell that cannot fit in this machine's memory whatever the data."""
    total = memory_bytes() if total is None else total
    if not total or not cells:
        return
    worst = max(cells, key=lambda c: cell_bytes_at_least(cfg, c.depth, len(c.seeds)))
    need = cell_bytes_at_least(cfg, worst.depth, len(worst.seeds))
    if need > total:
        raise ConfigError(f"model.width: a cell of depth {worst.depth} with {len(worst.seeds)} seeds needs at "
                          f"least {_gb(need)} of memory for its weights, more than this machine's {_gb(total)}; "
                          "lower model.width, the deepest depth or sweep.seeds_per_cell")


def _gb(n: float) -> str:
    for unit, size in (("PB", 1e15), ("TB", 1e12), ("GB", 1e9), ("MB", 1e6)):
        if n >= size:
            return f"{n / size:.3g} {unit}"
    return f"{n:.0f} bytes"


# --------------------------------------------------------------------------- order of work
def expected_cost(cfg: SweepFile, spec: CellSpec) -> float:
    """Relative cost of a cell before it runs: its seeds times the time of one update at its depth."""
    return len(spec.seeds) * seconds_per_update(cfg, spec.depth)
