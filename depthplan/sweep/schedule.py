"""Where a sweep spends its budget: tuned learning rates, adaptive depths, early censoring.

- `tune_depth`: per depth, an Optuna study searches the learning rate on a log
  scale (TPE, seeded), each trial a few seeds apart from the final ones, the
  objective the median T with censored and diverged runs penalised. Every
  trial is kept in the store.
- `decide`: after a round of an adaptive sweep, fit what is stored and say
  which depths and seeds to add, or why to stop. Pure: tests drive it with a
  simulated T(K), no training.
- `early_budget`: the update count past which a run is stopped and stored as
  censored (a multiple of the best median T so far).

Torch is imported only inside `tune_depth` (through the trainer).
"""
from __future__ import annotations

import logging
import math
import statistics
import warnings
from dataclasses import dataclass, field
from typing import Any, Callable

from ..config import AdaptiveConfig, SweepFile, TuneConfig
from ..records import PROBE_SERIES, CellSpec, RateMode, RunResult, rate_group

log = logging.getLogger(__name__)

TUNING_SEED0 = 1000   # tuning trials use seeds 1000, 1001, ...: never the seeds of the final runs


# --------------------------------------------------------------------------- early censoring

def median_t(runs: list[RunResult]) -> float:
    """Median updates-to-convergence, with censored and diverged runs as +inf (inf if most are)."""
    vals = sorted(r.iterations if r.status == "converged" else math.inf for r in runs)
    return statistics.median(vals) if vals else math.inf


def early_budget(stored: list[RunResult], spec: CellSpec, multiple: float | None, max_updates: int) -> int | None:
    """Updates after which the cell's runs stop as censored, or None for the full budget.

    The best median T so far is taken over the stored depths of the same
    learning-rate curve (same rate, or every tuned depth); a run that takes
    more than `multiple` times that cannot be near the optimum.
    """
    if multiple is None:
        return None
    same = [r for r in stored if r.lr_mode == spec.lr_mode and rate_group(r) == rate_group(spec)]
    by_depth: dict[int, list[RunResult]] = {}
    for r in same:
        by_depth.setdefault(r.depth, []).append(r)
    best = min((median_t(rs) for rs in by_depth.values()), default=math.inf)
    if not math.isfinite(best):
        return None
    cap = int(math.ceil(multiple * best))
    return cap if cap < max_updates else None


def early_censor_saving(runs: list[RunResult], max_updates: int) -> tuple[int, int]:
    """(runs stopped early, seed-updates saved against running them to the budget)."""
    early = [r for r in runs if r.status == "censored" and r.iterations < max_updates]
    return len(early), sum(max_updates - r.iterations for r in early)


# --------------------------------------------------------------------------- learning-rate tuning

def tuning_objective(runs: list[RunResult], max_updates: int, penalty: float) -> float:
    """Median T of a tuning trial; censored runs count penalty x budget, diverged twice that."""
    vals = []
    for r in runs:
        if r.status == "converged":
            vals.append(float(r.iterations))
        elif r.status == "censored":
            vals.append(penalty * max_updates)
        else:
            vals.append(2.0 * penalty * max_updates)
    return float(statistics.median(vals))


def tuning_study_name(sweep: str, depth: int) -> str:
    return f"{sweep}:tune:K{depth}"


def tune_depth(cfg: SweepFile, storage: Any, depth: int, *, progress: Callable[[int], None] | None = None) -> float:
    """Search the learning rate of one depth; return the best rate found.

    Resumable: trials already complete in the store count, orphaned running
    ones (their process died) are failed, and only the rest are run.
    """
    import optuna
    from optuna.trial import TrialState

    from ..train.datasets import load_dataset
    from ..train.loop import train_cell

    tune: TuneConfig = cfg.train.tune  # type: ignore[assignment]
    sampler = optuna.samplers.TPESampler(seed=depth, n_startup_trials=min(4, tune.trials))
    study = optuna.create_study(study_name=tuning_study_name(cfg.name, depth), storage=storage,
                                sampler=sampler, direction="minimize", load_if_exists=True)
    for t in study.get_trials(deepcopy=False, states=(TrialState.RUNNING,)):
        storage.set_trial_state_values(t._trial_id, state=TrialState.FAIL)
    n_done = len(study.get_trials(deepcopy=False, states=(TrialState.COMPLETE,)))
    data = None
    seeds = tuple(range(TUNING_SEED0, TUNING_SEED0 + tune.seeds))
    for _ in range(max(0, tune.trials - n_done)):
        trial = study.ask()
        lr = trial.suggest_float("learning_rate", tune.low, tune.high, log=True)
        if data is None:
            data = load_dataset(cfg.data)
        spec = CellSpec(depth=depth, seeds=seeds, learning_rate=lr, lr_mode=RateMode.TUNING)
        try:
            runs = train_cell(spec, cfg.model, cfg.train, cfg.probes, data, progress=progress)
        except BaseException:
            study.tell(trial, state=TrialState.FAIL)
            raise
        trial.set_user_attr("runs", [r.to_dict() | {"train_loss": [], "eval_steps": [], "probe_steps": [],
                                                    "snr_steps": [], **{k: [] for k in PROBE_SERIES}}
                                     for r in runs])
        study.tell(trial, tuning_objective(runs, cfg.train.max_updates, tune.penalty))
    return float(study.best_params["learning_rate"])


def tuning_trials(storage: Any, sweep: str, depths: list[int]) -> list[dict[str, Any]]:
    """Every finished tuning trial of the given depths, as table rows."""
    import optuna
    from optuna.trial import TrialState

    rows = []
    for depth in depths:
        try:
            study = optuna.load_study(study_name=tuning_study_name(sweep, depth), storage=storage)
        except KeyError:
            continue
        for t in study.get_trials(deepcopy=False, states=(TrialState.COMPLETE,)):
            statuses = [r["status"] for r in t.user_attrs.get("runs", [])]
            rows.append({"depth": depth, "trial": t.number, "learning_rate": t.params["learning_rate"],
                         "objective": t.value, "statuses": " ".join(statuses)})
    return rows


def rate_at_edge(rate: float, tune: TuneConfig, margin: float = 0.1) -> bool:
    """True when a tuned rate lies within `margin` of its log range's either end."""
    span = math.log(tune.high / tune.low)
    pos = math.log(rate / tune.low) / span
    return pos < margin or pos > 1 - margin


# --------------------------------------------------------------------------- adaptive depths

@dataclass
class Decision:
    """What one round of an adaptive sweep concluded."""

    stop: bool
    reason: str
    add_depths: list[int] = field(default_factory=list)
    add_seeds: dict[int, int] = field(default_factory=dict)   # depth -> how many seeds to add
    reversal: dict[str, Any] | None = None

    def to_dict(self) -> dict[str, Any]:
        return {"stop": self.stop, "reason": self.reason, "add_depths": self.add_depths,
                "add_seeds": {str(k): v for k, v in self.add_seeds.items()}, "reversal": self.reversal}


def _spread(runs: list[RunResult]) -> float:
    """Interquartile range of log T over a depth's runs (censored runs at their bound)."""
    vals = sorted(math.log(max(r.iterations, 1)) for r in runs)
    if len(vals) < 2:
        return math.inf
    q = statistics.quantiles(vals, n=4, method="inclusive")
    return q[2] - q[0]


def _stop_before_depths(policy: AdaptiveConfig, status: str | None, round_no: int, cpu_seconds: float) -> str | None:
    """Why to stop whatever the depths say (budget spent, last round, no gain from depth), or None."""
    if policy.cpu_budget_s is not None and cpu_seconds >= policy.cpu_budget_s:
        return f"compute budget spent ({cpu_seconds:.0f} of {policy.cpu_budget_s:.0f} CPU s)"
    if round_no >= policy.max_rounds:
        return f"reached the last round ({policy.max_rounds})"
    if status == "none":
        return "depth gives no gain over the swept range"
    return None


def _target_reached(swept: list[int], k_star: float, ci: list[float] | None, policy: AdaptiveConfig) -> str | None:
    """Why to stop when the reversal interval is within the target with two depths past it, or None."""
    past = [k for k in swept if k > k_star]
    width = (ci[1] - ci[0]) if ci else math.inf
    if width <= policy.target_width and len(past) >= 2:
        return f"reversal depth interval {width:.1f} layers, within the target {policy.target_width:g}"
    return None


def _depths_near_minimum(swept: list[int], k_star: float, ci: list[float] | None) -> set[int]:
    """Integer depths around the reversal depth and its interval ends, with at least two beyond it."""
    lo, hi = math.floor(k_star), math.ceil(k_star)
    add = {lo - 1, lo, hi, hi + 1}
    if ci:
        add |= {math.floor(ci[0]), math.ceil(ci[1])}
    return _two_beyond(swept, add, k_star)


def _two_beyond(swept: list[int], add: set[int], k_star: float) -> set[int]:
    """`add` and more depths past it until at least two (swept or added) lie beyond the reversal depth."""
    add = set(add)
    beyond = sorted(k for k in swept if k > k_star)
    nxt = max(swept) if beyond else math.ceil(k_star)
    while len([k for k in set(swept) | add if k > k_star]) < 2:
        nxt += max(1, nxt // 4)
        add.add(nxt)
    return add


def _extra_seeds(runs: list[RunResult], policy: AdaptiveConfig) -> dict[int, int]:
    """`policy.extra_seeds` more seeds at the depth whose T spreads most (none when it is zero)."""
    by_depth: dict[int, list[RunResult]] = {}
    for r in runs:
        by_depth.setdefault(r.depth, []).append(r)
    seeds: dict[int, int] = {}
    if policy.extra_seeds:
        noisiest = max(by_depth, key=lambda k: _spread(by_depth[k]))
        seeds[noisiest] = policy.extra_seeds
    return seeds


def decide(runs: list[RunResult], policy: AdaptiveConfig, *, round_no: int, cpu_seconds: float,
           n_boot: int = 200, seed: int = 0) -> Decision:
    """Fit the stored runs and choose the next round's depths and seeds, or stop.

    Stops when the reversal depth's 95 % interval is narrower than
    `policy.target_width` layers (with two swept depths beyond it), when T is
    still falling at `policy.high`, when depth gives no gain, when the CPU
    budget is spent, or after `policy.max_rounds` rounds. Otherwise adds the
    integer depths next to the current minimum (and at least two beyond it),
    or, while T still falls, deeper depths; and `policy.extra_seeds` seeds at
    the depth whose T spreads most.

    Where the fit's answer lies in a gap of the swept depths, or its models
    disagree, the depths added are `planning.next_depths` of the fit: the same
    rule (`depthplan.fitting.planning.depths_in_gaps`) that the fit reports, so
    the sweep fills exactly the gaps the summary names, before it narrows the
    interval around the minimum.
    """
    from ..errors import ConvergenceWarning, DataError
    from ..fitting.assemble import fit_runs

    swept = sorted({r.depth for r in runs})
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ConvergenceWarning)
            fit = fit_runs(runs, n_boot=n_boot, seed=seed)
    except DataError as exc:
        return Decision(True, f"cannot fit the runs so far ({exc}); no depth added")
    rev = fit.get("reversal") or {}
    status, k_star, ci = rev.get("status"), rev.get("depth"), rev.get("depth_ci")
    summary = {"status": status, "depth": k_star, "depth_ci": ci}
    stop = _stop_before_depths(policy, status, round_no, cpu_seconds)
    if stop is not None:
        return Decision(True, stop, reversal=summary)
    if status == "observed" and k_star is not None:
        stop = _target_reached(swept, k_star, ci, policy)
        if stop is not None:
            return Decision(True, stop, reversal=summary)
        gaps = set((fit.get("planning") or {}).get("next_depths") or [])
        add = _two_beyond(swept, gaps, k_star) if gaps else _depths_near_minimum(swept, k_star, ci)
    else:  # still falling at the deepest depth (or too little to tell): go deeper
        deepest = max(swept)
        if deepest >= policy.high:
            return Decision(True, f"T still falls at the deepest allowed depth ({policy.high})", reversal=summary)
        add = {min(policy.high, math.ceil(deepest * 1.5)), min(policy.high, deepest * 2)}
    add = {k for k in add if policy.low <= k <= policy.high and k not in swept}
    seeds = _extra_seeds(runs, policy)
    if not add and not seeds:
        return Decision(True, "no depth left to add near the minimum", reversal=summary)
    gap_words = ("inside the gaps of the swept depths around"
                 if status == "observed" and (fit.get("planning") or {}).get("next_depths") else "near")
    where = f"{gap_words} the minimum at K={k_star:.1f}" if status == "observed" and k_star else "beyond the deepest depth"
    return Decision(False, f"round {round_no}: adding depths {sorted(add)} {where}"
                           + (f", {policy.extra_seeds} seeds at K={next(iter(seeds))}" if seeds else ""),
                    sorted(add), seeds, summary)
