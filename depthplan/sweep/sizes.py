"""Proxy sizes of a sweep: which sizes are swept, the rows each size trains on, the held-out size.

A proxy size is (hidden width, training rows); 0 on an axis means the sweep does not vary it (the
model's width, the whole training split). `sweep.widths` x `sweep.train_rows` are the swept sizes;
`sweep.verify` names one larger size that the transfer fit never sees: once every swept cell is
stored, its figures are predicted from the swept sizes and the prediction is stored (in the sweep's
store and sweep.json) before a single run of it trains (shared/DESIGN.md section 8).

The rows of a size are a stratified, seeded, NESTED draw from the training split: one order of
the split's rows is fixed per split seed, and a size of n rows trains on the first n of it, so a
smaller size's rows are a subset of every larger size's. The order is built by the quota method of
apportionment (Balinski and Young 1975, "The quota method of apportionment", Amer. Math. Monthly
82; from memory): every prefix holds each class within one row of its share of the split.

Never imports torch.
"""
from __future__ import annotations

import functools
import itertools
import json
import logging
import time
from dataclasses import replace
from typing import Any, Sequence

import numpy as np

from ..config import ModelConfig, SweepFile
from ..errors import ConfigError, DepthplanError
from ..records import CellSpec, RunResult

log = logging.getLogger(__name__)

Size = tuple[int, int]
_ROW_SALT = 0x5123     # keeps the row order apart from every other seeded stream


def swept_sizes(cfg: SweepFile) -> list[Size]:
    """The (width, rows) sizes the transfer fit uses, smallest first; [(0, 0)] without size axes."""
    return list(itertools.product(cfg.sweep.widths or (0,), cfg.sweep.train_rows or (0,)))


def verify_size(cfg: SweepFile) -> Size | None:
    """The held-out size: sweep.verify's axes, the largest swept value on an axis it leaves unset."""
    v = cfg.sweep.verify
    if v is None:
        return None
    return (v.width or max(cfg.sweep.widths or (0,)), v.train_rows or max(cfg.sweep.train_rows or (0,)))


def all_sizes(cfg: SweepFile) -> list[Size]:
    """Every size the sweep trains: the swept ones, then the held-out one."""
    held = verify_size(cfg)
    return swept_sizes(cfg) + ([held] if held else [])


def size_dict(size: Size) -> dict[str, int | None]:
    return {"width": size[0] or None, "train_rows": size[1] or None}


def at_sizes(cells: Sequence[CellSpec], sizes: Sequence[Size]) -> list[CellSpec]:
    """Every cell at every size (size by size); the cells themselves when there is only (0, 0)."""
    if list(sizes) == [(0, 0)]:
        return list(cells)
    return [replace(c, width=w, train_rows=n) for w, n in sizes for c in cells]


def same_size(runs: Sequence[RunResult], spec: CellSpec) -> list[RunResult]:
    """The runs of the cell's proxy size (a run that does not record an axis counts as the sweep's)."""
    width_ok = (lambda r: True) if not spec.width else (lambda r: r.width == spec.width)
    return [r for r in runs if width_ok(r) and (r.train_rows or 0) == spec.train_rows]


# ---------------------------------------------------------------- the rows of a size

@functools.lru_cache(maxsize=4)
def _row_order(labels: bytes, seed: int, n: int) -> np.ndarray:
    y = np.frombuffer(labels, dtype=np.int64)
    classes, counts = np.unique(y, return_counts=True)
    rng = np.random.default_rng([int(seed), _ROW_SALT])
    members = [rng.permutation(np.flatnonzero(y == c)) for c in classes]
    share = counts / counts.sum()
    taken = np.zeros(len(classes), dtype=np.int64)
    order = np.empty(n, dtype=np.int64)
    for t in range(1, n + 1):
        # quota method: a class may take the next row only while under its upper quota at t rows;
        # among those, the one with most share per row already held (Jefferson's divisor)
        eligible = (taken < share * t) & (taken < counts)
        c = int(np.argmax(np.where(eligible, share / (taken + 1), -np.inf)))
        order[t - 1] = members[c][taken[c]]
        taken[c] += 1
    return order


def draw_rows(y: np.ndarray, n: int, seed: int) -> np.ndarray:
    """Indices of the n training rows a proxy of n rows trains on (stratified, seeded, nested).

    The first n of one seeded order of all rows, so draw_rows(y, m, seed) for m < n is a prefix of
    draw_rows(y, n, seed); every class holds within one row of n x its share of `y`.
    """
    y = np.ascontiguousarray(y, dtype=np.int64)
    if not 1 <= n <= len(y):
        raise ValueError(f"n must be between 1 and {len(y)}, got {n}")
    return _row_order(y.tobytes(), int(seed), int(n)).copy()


def sized_inputs(spec: CellSpec, cfg: SweepFile, data: Any) -> tuple[ModelConfig, Any]:
    """The model section and the task a cell of this size trains on."""
    model = replace(cfg.model, width=spec.width) if spec.width else cfg.model
    if not spec.train_rows or spec.train_rows >= len(data.y_train):
        return model, data
    idx = np.sort(draw_rows(data.y_train, spec.train_rows, cfg.data.split_seed))
    return model, replace(data, x_train=data.x_train[idx], y_train=data.y_train[idx],
                          description=f"{data.description}; {spec.train_rows} of its training rows")


def stamp_rows(spec: CellSpec, results: list[RunResult]) -> list[RunResult]:
    """The cell's runs with the rows they trained on recorded (0 stays 0: the whole split)."""
    return [replace(r, train_rows=spec.train_rows) for r in results] if spec.train_rows else results


def check_against_data(cfg: SweepFile, n_train: int, n_classes: int) -> None:
    """Raise `ConfigError` (one line, naming the key) when a row count does not fit the split."""
    s = cfg.sweep
    asked = [(f"sweep.train_rows[{i}]", n) for i, n in enumerate(s.train_rows or ())]
    if s.verify is not None and s.verify.train_rows:
        asked.append(("sweep.verify.train_rows", s.verify.train_rows))
    for key, n in asked:
        if n > n_train:
            raise ConfigError(f"{key}: {n} is more than the training split has ({n_train} rows)")
        if n < n_classes:
            raise ConfigError(f"{key}: {n} rows cannot hold each of the {n_classes} classes once")


def check_sizes(cfg: SweepFile) -> None:
    """`check_against_data` with the sweep's own data (loaded only when a row count is asked for)."""
    if not cfg.sweep.train_rows and not (cfg.sweep.verify and cfg.sweep.verify.train_rows):
        return
    from ..train.datasets import load_dataset

    data = load_dataset(cfg.data)
    check_against_data(cfg, len(data.y_train), data.n_classes)


# ---------------------------------------------------------------- predict, then verify

#: The store's key of the prediction for the held-out size (written once, before it trains).
PREDICTION_KEY = "verify_prediction"
_KEPT = ("reversal_depth", "reversal_depth_ci", "slope", "slope_ci", "alpha", "alpha_ci",
         "last_depth_worth_adding", "depth_to_plan_for", "depth_to_plan_for_range",
         "plan_basis", "extrapolation_factor", "notes")


def predict_held_out(cfg: SweepFile, runs: Sequence[RunResult], *, n_boot: int = 400) -> dict[str, Any]:
    """The prediction for the held-out size from the runs of the swept sizes (as stored in the store)."""
    from ..fitting.assemble import fit_runs

    size = verify_size(cfg)
    assert size is not None
    swept = set(swept_sizes(cfg))
    used = [r for r in runs if (r.width if cfg.sweep.widths else 0, r.train_rows or 0) in swept]
    record: dict[str, Any] = {**size_dict(size), "predicted_at": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
                              "n_runs": len(used), "n_boot": n_boot, "status": None, "reason": "", "prediction": None}
    try:
        fit = fit_runs(used, n_boot=n_boot, target=size_dict(size), source=f"{cfg.name} (swept sizes)")
    except DepthplanError as exc:
        record.update(status="not_fitted", reason=str(exc))
        return record
    t = fit.get("transfer") or {}
    record.update(status=t.get("status"), reason=t.get("reason", ""),
                  prediction={k: (t.get("target") or {}).get(k) for k in _KEPT} if t.get("target") else None)
    return json.loads(json.dumps(record))


def sweep_facts(cfg: SweepFile, meta: dict[str, Any]) -> dict[str, Any]:
    """The sizes, held-out size (with its stored prediction) and target, for sweep.json; {} without them."""
    out: dict[str, Any] = {}
    s = cfg.sweep
    if s.widths or s.train_rows:
        out["sizes"] = [size_dict(z) for z in swept_sizes(cfg)]
    held = verify_size(cfg)
    if held is not None:
        out["verify"] = {**size_dict(held), "prediction": meta.get(PREDICTION_KEY)}
    if cfg.target is not None:
        out["target"] = {"width": cfg.target.width, "train_rows": cfg.target.train_rows,
                         "n_params": cfg.target.n_params}
    return out


def size_lines(cfg: SweepFile) -> list[str]:
    """What `depthplan check` says about the sizes, the held-out size and the target ([] without them)."""
    lines = []
    if cfg.sweep.widths or cfg.sweep.train_rows:
        words = [f"widths {', '.join(map(str, cfg.sweep.widths))}" if cfg.sweep.widths else "",
                 f"training rows {', '.join(map(str, cfg.sweep.train_rows))}" if cfg.sweep.train_rows else ""]
        lines.append(f"sizes    {len(swept_sizes(cfg))} proxy sizes ({'; '.join(w for w in words if w)}), "
                     "every cell at each")
    held = verify_size(cfg)
    if held is not None:
        lines.append(f"verify   {_words(held)}: predicted from the sizes above, then trained "
                     f"(held out of the transfer fit)")
    if cfg.target is not None:
        t = cfg.target
        lines.append(f"target   {_words((t.width or 0, t.train_rows or 0))}"
                     + (f", about {t.n_params:,} parameters" if t.n_params else ""))
    return lines


def _words(size: Size) -> str:
    return ", ".join(p for p in (f"width {size[0]}" if size[0] else "",
                                 f"{size[1]} training rows" if size[1] else "") if p)


def prediction_lines(verify: dict[str, Any] | None) -> list[str]:
    """What `depthplan run` prints about the held-out size's stored prediction (sweep.json's `verify`)."""
    record = (verify or {}).get("prediction")
    if not record:
        return []
    where = _words((verify.get("width") or 0, verify.get("train_rows") or 0))
    p = record.get("prediction") or {}
    if record.get("status") == "not_fitted" or not p:
        return [f"held-out size ({where}): no prediction could be made from the swept sizes "
                f"({record.get('reason') or record.get('status')})"]
    parts = []
    if p.get("reversal_depth") is not None:
        lo, hi = p["reversal_depth_ci"]
        parts.append(f"K* {p['reversal_depth']:.1f} (95 % interval {lo:.1f} to {hi:.1f})")
    if p.get("slope") is not None:
        parts.append(f"s {p['slope']:.2f}")
    if p.get("depth_to_plan_for") is not None:
        parts.append(f"depth to plan for {p['depth_to_plan_for']}")
    return [f"held-out size ({where}) predicted before it trained, at {record['predicted_at']}: "
            + (", ".join(parts) or f"no figures ({record.get('reason')})")
            + "; `depthplan fit` or `report` compares it with what it measured"]
