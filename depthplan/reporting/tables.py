"""The report's tables and later sections: the fit, per depth, rate groups, tuning, rounds,
warnings and provenance.

As in `depthplan.report_answer`, numbers from fit.json go through `Words`;
numbers computed from the runs (costs, accuracies, ratios) are formatted here.
"""
from __future__ import annotations

import datetime as _dt
import hashlib
import math
import os
import platform
import statistics
import subprocess
from importlib import metadata
from pathlib import Path


from .. import __version__
from ..fit_record import ABSENT, DepthRow, FitGroup, given
from . import figures as F
from ..fitting.cost import cost_basis_of, cost_per_update
from ..fitting.rates import rate_effect_of, rate_effect_words
from .answer import badge, planned_cost_model, save_percent
from ..fitting.summary import MODEL_LABELS
from .inputs import ReportInputs
from .markup import Block, Words

_PACKAGES = ("numpy", "scipy", "matplotlib", "torch", "optuna", "scikit-learn", "pyyaml")


# ---------------------------------------------------------------- tables

def fit_table_blocks(inp: ReportInputs, w: Words) -> list[Block]:
    """The fitted quantities with their intervals."""
    fit = inp.result
    pl, rev, plan = fit.power_law, fit.reversal, fit.planning
    rows = [["slope s of log T on log K", w.num("power_law.slope"), w.interval("power_law.slope_ci"),
             f"bootstrap percentile; t interval {w.interval('power_law.slope_ci_analytic')}"],
            ["standard error of s", w.num("power_law.slope_se", ".3f"), "", "observed information"],
            ["α = 1/(1 − s)", w.num("power_law.alpha") if given(pl.alpha) else
             "not defined", w.interval("power_law.alpha_ci"),
             "" if given(pl.alpha) else "no depth gain"],
            ["intercept log c", w.num("power_law.intercept", ".3f"), "",
             f"standard error {w.num('power_law.intercept_se', '.3f')}"],
            ["residual sd of log T", w.num("power_law.sigma", ".3f"), "", f"R² = {w.num('power_law.r2', '.3f')}"],
            ["depths in the law", ", ".join(str(k) for k in pl.depths_used), "",
             f"{w.num('power_law.n_runs', 'd')} runs, {w.num('power_law.n_censored', 'd')} censored; "
             f"{pl.method}"]]
    if pl.without_shallowest:
        rows.append(["s without the shallowest depth", w.num("power_law.without_shallowest.slope"),
                     w.interval("power_law.without_shallowest.slope_ci"), "capacity check"])
    rows.append(["reversal", rev.status.replace("_", " "), "", rev.note or ""])
    if rev.status == "observed":
        rows.append(["reversal depth K*", w.num("reversal.depth", ".1f"),
                     w.interval("reversal.depth_ci", ".1f"),
                     f"minimum of the {MODEL_LABELS.get(rev.model or 'segmented', 'broken stick')}"
                     + ("; interval reselects the model on every bootstrap replicate" if fit.models else "")])
    if given(rev.rising_slope):
        rows.append(["slope past the breakpoint", w.num("reversal.rising_slope"),
                     w.interval("reversal.rising_slope_ci"), ""])
    if given(rev.bic_single) and given(rev.bic_segmented):
        rows.append(["BIC: single law / broken stick", f"{w.num('reversal.bic_single', '.1f')} / "
                     f"{w.num('reversal.bic_segmented', '.1f')}", "", "lower is better"])
    if given(rev.smooth_depth):
        rows.append(["minimum of T = A·K^{s} + B·K^{r}", w.num("reversal.smooth_depth", ".1f"), "",
                     "cross-check of K*"])
    for key, label, note in (("last_depth_worth_adding", "last depth worth adding",
                              f"next layer saves under {save_percent(w)} %"),
                             ("compute_optimal_depth", "compute-optimal depth",
                              "fewest updates × FLOPs per update"
                              if plan.cost_basis == "flops" else
                              "fewest updates × seconds per update")):
        fig = getattr(plan, key)
        rows.append([label, (w.num(f"planning.{key}.depth", "d") + badge(fig.extrapolated))
                     if fig.depth is not None else "not given",
                     w.interval(f"planning.{key}.ci", "d"), note])
    rows.append(["depth to plan for", w.num("planning.recommended_depth", "d")
                 + badge(plan.recommended_extrapolated), "", plan.recommended_basis or ""])
    model = plan.model if given(plan.model) else None
    return [("h", 3, "The fit", "fit-table"),
            ("p", f"Fitted on the {F.group_label(inp.result.group)}; the planning figures use the "
                  f"{MODEL_LABELS.get(model or 'power_law', model)}"
                  + (" (chosen by AICc among the candidate models)" if fit.models else "")
                  + ". Intervals are 95 %.", "small"),
            ("table", ["quantity", "estimate", "95 % interval", "note"], rows, "fit")]


def _median(values: list[float]) -> float | None:
    values = [v for v in values if isinstance(v, (int, float)) and math.isfinite(v)]
    return statistics.median(values) if values else None


def _fmt(v: float | None, spec: str, unit: str = "") -> str:
    return "–" if v is None else f"{format(v, spec)}{unit}"


def _probe_by_depth(fit: FitGroup) -> dict[int, dict[str, float | None]]:
    layers = (fit.diffusion.layers or []) if fit.diffusion else []
    out: dict[int, dict[str, float | None]] = {}
    for k in sorted({row.depth for row in layers}):
        at = [row for row in layers if row.depth == k]
        out[k] = {key: _median([getattr(row, key) for row in at if given(getattr(row, key))])
                  for key in ("late_exponent", "transition_step", "snr_drop_db")}
    return out


def _flops_cell(fit: FitGroup, depth: int) -> str:
    """MFLOP of one update at `depth` on the FLOP basis, else '–'."""
    cost = planned_cost_model(fit.planning.compute_optimal_depth)
    if cost_basis_of(cost) != "flops":
        return "–"
    value = float(cost_per_update(cost, [depth])[0])
    return _fmt(value / 1e6 if math.isfinite(value) else None, ".3g")


def _accuracy_cell(row: DepthRow, at: list, w: Words, p: str) -> str:
    """'80.0 % (77.8–80.5)' from the per-depth row; from the runs for fits written before it."""
    if not given(row.validation_accuracy):
        acc = _median([r.validation_accuracy for r in at])
        return _fmt(None if acc is None else 100 * acc, ".1f", " %")
    return (f"{w.num(p + 'validation_accuracy', '.1f@100')} % "
            f"({w.num(p + 'validation_accuracy_lo', '.1f@100')}–"
            f"{w.num(p + 'validation_accuracy_hi', '.1f@100')})")


def depth_table_blocks(inp: ReportInputs, w: Words) -> list[Block]:
    """One row per depth: runs, T, cost, accuracy and the probe measures."""
    fit, runs = inp.result, inp.primary_runs
    probes = _probe_by_depth(fit)
    rows = []
    for i, row in enumerate(fit.per_depth):
        p = f"per_depth.{i}."
        at = [r for r in runs if r.depth == row.depth]
        if row.median is not None:
            median = w.num(p + "median", ",.0f")
        elif given(row.budget):
            median = f"> {w.num(p + 'budget', ',.0f')}"
        else:
            median = row.median_note or "–"
        quart = (f"{w.num(p + 'q25', ',.0f')}–{w.num(p + 'q75', ',.0f')}"
                 if row.q25 is not None else row.quartile_note or "–")
        compute = _median([r.iterations * r.seconds_per_update for r in at if r.status == "converged"])
        pr = probes.get(row.depth, {})
        rows.append([w.num(p + "depth", "d"),
                     f"{w.num(p + 'runs', 'd')} ({w.num(p + 'converged', 'd')} / "
                     f"{w.num(p + 'censored', 'd')} / {w.num(p + 'diverged', 'd')})",
                     median, quart, _flops_cell(fit, row.depth),
                     w.num(p + "seconds_per_update", ".3g@1e3") if row.seconds_per_update else "–",
                     _fmt(compute, ".3g"), _accuracy_cell(row, at, w, p),
                     _fmt(pr.get("late_exponent"), ".2f"), _fmt(pr.get("transition_step"), ".0f"),
                     _fmt(pr.get("snr_drop_db"), ".1f")])
    header = ["K", "runs (conv. / cens. / div.)", "median T", "quartiles of T", "MFLOP per update",
              "ms per update (this machine)", "seconds to converge (this machine)",
              "validation accuracy: median (spread over seeds)", "late displacement exponent",
              "transition step", "SNR drop (dB)"]
    keep = [j for j in range(len(header)) if j < 4 or any(r[j] != "–" for r in rows)]
    return [("p", f"For the {F.group_label(inp.result.group)}. Medians and quartiles of T rank censored "
                  "runs last, so a median is given only while fewer than half of a depth's runs are "
                  "censored (a quartile: a quarter); otherwise T is more than the budget shown. "
                  "MFLOP per update is the analytic count of the network as built (forward and "
                  "backward matrix products); seconds to converge is the median over converged runs "
                  "of updates × this machine's seconds per update. Validation accuracy: median over "
                  "seeds, with the lowest and highest seed in brackets. Probe "
                  "columns are medians over layers of the per-layer medians over seeds.", "small"),
            ("table", [header[j] for j in keep], [[r[j] for j in keep] for r in rows], "numbers")]


# ---------------------------------------------------------------- learning rates, tuning, rounds

def _rate_product_words(g: FitGroup) -> str:
    """How T·lr·K trends over the depths of a fixed-rate group's law, and what that direction means."""
    effect = g.rate_effect or rate_effect_of(g.to_dict())
    if not effect:
        return ""
    text = rate_effect_words(effect)
    return text[0].upper() + text[1:] + "."


def rate_blocks(inp: ReportInputs, w: Words) -> list[Block]:
    """Rate groups side by side, and the effective-rate effect in words."""
    fit = inp.result
    entries = fit.by_learning_rate or []
    rows = []
    for i, g in enumerate(entries):
        gw = Words(inp.fit, f"by_learning_rate.{i}.")
        label = F.group_label(g.group)
        if g.power_law is ABSENT:
            rows.append([label, gw.num("group.n_runs", "d"), f"not fitted: {g.extra.get('skipped', '')}",
                         "", "", "", ""])
            continue
        rows.append([label, gw.num("group.n_runs", "d"), gw.num("power_law.slope"),
                     gw.interval("power_law.slope_ci"),
                     gw.num("power_law.alpha") if given(g.power_law.alpha) else "–",
                     g.reversal.status.replace("_", " ") + (
                         f" at {gw.num('reversal.depth', '.1f')}" if g.reversal.depth else ""),
                     gw.num("planning.recommended_depth", "d")
                     + badge(g.planning.recommended_extrapolated)])
    blocks: list[Block] = [
        ("p", f"The sweep holds {len(entries)} learning-rate groups, each fitted on its own; the "
              f"answer at the top is for the {F.group_label(fit.group)}."),
        ("table", ["group", "runs", "slope s", "95 % interval", "α", "reversal", "depth to plan for"],
         rows, "numbers")]
    words = ["**The effective-rate effect.** With one learning rate for every depth, depth partly "
             "acts as a learning-rate multiplier: a deeper stack moves its output further per update "
             "at the same rate. If depth did nothing else, T·lr·K would stay constant across K; "
             "whether it falls, stays level or rises says how much more (or less) depth does, and a "
             "fixed-rate slope measures the rate as well as the depth."]
    fixed = [g for g in F.fitted_groups(fit) if g.group.lr_mode == "fixed"]
    words += [s for s in (_rate_product_words(g) for g in fixed) if s]
    tuned = [i for i, g in enumerate(entries) if g.group.lr_mode == "tuned" and g.power_law is not ABSENT]
    fixed_at = [i for i, g in enumerate(entries) if g.group.lr_mode == "fixed" and g.power_law is not ABSENT]
    if tuned and fixed_at:
        against = ", ".join(f"{w.num(f'by_learning_rate.{i}.power_law.slope')} at the "
                            f"{F.group_label(entries[i].group)}" for i in fixed_at)
        words.append(f"With the rate tuned per depth the slope is "
                     f"{w.num(f'by_learning_rate.{tuned[0]}.power_law.slope')}, against {against}: "
                     "the difference is gain that a fixed rate credits to depth but a rate chosen "
                     "for each depth gives anyway; the answer at the top uses the tuned rate.")
    inter = fit.lr_interaction
    if inter and given(inter.lr_exponent):
        words.append(f"Across the fixed rates T scales as lr^{{{w.num('lr_interaction.lr_exponent')}}} "
                     "(an exponent near −1 together with s near −1 is a constant T·lr·K).")
    words.append("Plan with the slope of the rate policy the big run will use: if its rate will be "
                 "tuned for its depth, the tuned-rate curve is the one that applies.")
    blocks.append(("p", " ".join(words)))
    return blocks


def tuning_blocks(inp: ReportInputs) -> list[Block]:
    """Per depth: trials, the rate the final seeds used, and whether it sits at the search edge."""
    tune = inp.config.train.tune if inp.config is not None else None
    chosen = {r.depth: r.learning_rate for r in inp.runs if r.lr_mode == "tuned"}
    rows = []
    for k in sorted({r["depth"] for r in inp.tuning}):
        at = [r for r in inp.tuning if r["depth"] == k]
        best = min(at, key=lambda r: r["objective"])
        rate = chosen.get(k, best["learning_rate"])
        edge = "–"
        if tune is not None:
            pos = math.log(rate / tune.low) / math.log(tune.high / tune.low)
            edge = "yes: widen the range" if pos < 0.1 or pos > 0.9 else "no"
        rates = [r["learning_rate"] for r in at]
        rows.append([str(k), str(len(at)), f"{rate:.3g}", f"{best['objective']:,.0f}",
                     f"{min(rates):.3g} to {max(rates):.3g}", edge])
    header = ["K", "trials", "rate used", "best objective (updates)", "rates tried",
              "at the edge of the range"]
    if tune is None:            # without the search range, the edge cannot be judged
        header, rows = header[:-1], [r[:-1] for r in rows]
    return [("table", header, rows, "numbers")]


def rounds_blocks(inp: ReportInputs) -> list[Block]:
    return [("h", 2, "Adaptive rounds", "rounds"),
            ("ul", [f"Round {i}: {r['reason']}" for i, r in enumerate(inp.rounds, 1)])]


def timing_note(fit: FitGroup) -> str:
    """A note when measured seconds per update stray far (over 2x) from the straight-line cost model."""
    cost = planned_cost_model(fit.planning.compute_optimal_depth)
    rows = [r for r in fit.per_depth if r.seconds_per_update]
    if cost_basis_of(cost) != "seconds" or len(rows) < 3:      # only the seconds basis rests on timings
        return ""
    worst = max(rows, key=lambda r: abs(math.log(r.seconds_per_update / (
        cost["seconds_intercept"] + cost["seconds_per_layer"] * r.depth))))
    line = cost["seconds_intercept"] + cost["seconds_per_layer"] * worst.depth
    ratio = worst.seconds_per_update / line
    if 0.5 <= ratio <= 2:
        return ""
    return (f"measured seconds per update stray far from a straight line in depth (at K = "
            f"{worst.depth}: {1e3 * worst.seconds_per_update:.3g} ms against {1e3 * line:.3g} "
            "ms on the line); the machine may have been busy while it trained. The compute-optimal "
            "depth rests on these timings: time the candidate depths on a quiet machine")


def _sentence(text: str) -> str:
    return text[0].upper() + text[1:] + ("" if text.endswith(".") else ".")


def warning_blocks(inp: ReportInputs, w: Words) -> list[Block]:
    notes = list(inp.result.warnings or [])
    notes += [n for n in (timing_note(inp.result),) if n]
    body: Block = ("ul", [_sentence(n) for n in notes]) if notes else \
        ("p", "Neither the fit nor the report raised a warning.")
    return [("h", 2, "Warnings", "warnings"), body]


# ---------------------------------------------------------------- provenance

def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with path.open("rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()[:16]


def _cpu() -> str:
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                return f"{line.split(':', 1)[1].strip()}, {os.cpu_count()} logical CPUs"
    except OSError:
        pass
    return f"{platform.processor() or platform.machine()}, {os.cpu_count()} logical CPUs"


def git_commit() -> str:
    """The depthplan checkout's commit (with a note when it has uncommitted changes), or a note."""
    here = str(Path(__file__).resolve().parent)
    try:
        head = subprocess.run(["git", "-C", here, "rev-parse", "HEAD"], capture_output=True,
                              text=True, timeout=10)
        if head.returncode:
            return "not a git checkout"
        dirty = subprocess.run(["git", "-C", here, "status", "--porcelain", "--untracked-files=no"],
                               capture_output=True, text=True, timeout=10).stdout.strip()
    except (OSError, subprocess.SubprocessError):
        return "git not available"
    return head.stdout.strip() + (" (with uncommitted changes)" if dirty else "")


def _versions() -> str:
    found = [f"depthplan {__version__}"]
    for name in _PACKAGES:
        try:
            found.append(f"{name} {metadata.version(name)}")
        except metadata.PackageNotFoundError:
            pass
    return ", ".join(found)


def _machine_rows(inp: ReportInputs) -> list[list[str]]:
    """The CPU that trained (when sweep.json records it) and the one that wrote the report."""
    rows = []
    trained = inp.info.get("machine")
    if isinstance(trained, dict) and trained:
        rows.append(["CPU that trained", ", ".join(f"{k} {v}" for k, v in trained.items())])
    note = ("; the machine that trained is not recorded, and the timings are its"
            if inp.kind == "results_folder" and not rows else "")
    return rows + [["CPU of this report", _cpu() + note]]


def provenance_blocks(inp: ReportInputs) -> list[Block]:
    """Where every number came from: inputs and their hashes, config, seeds, software, machine."""
    fit, info = inp.result, inp.info
    runs_file = next((p for p in (inp.path / "runs.jsonl", inp.path / "runs.csv") if p.is_file()),
                     None) if inp.kind == "results_folder" else inp.path
    rows = [["input", f"{inp.kind.replace('_', ' ')} `{inp.path}`"]]
    if runs_file is not None:
        stamp = _dt.datetime.fromtimestamp(runs_file.stat().st_mtime, _dt.timezone.utc)
        rows.append(["runs", f"`{runs_file.name}`, {len(inp.runs)} records, sha256 "
                             f"{_sha256(runs_file)}…, written {stamp:%Y-%m-%d %H:%M} UTC"])
    fingerprint = info.get("fingerprint") or (inp.config.fingerprint() if inp.config else None)
    if fingerprint:
        rows.append(["config hash", f"{fingerprint} (fingerprint of the settings that change what a "
                                    "run measures)"])
    if info.get("config_file"):
        rows.append(["config file", f"`{info['config_file']}`"])
    families = sorted({(r.family, r.model_options) for r in inp.runs if getattr(r, "family", "")})
    if inp.config is not None:
        families = [(inp.config.model.family_name, inp.config.model.options_text())]
    for family, options in families:
        rows.append(["model family", family + (f" ({options})" if options else "")])
    seeds = info.get("seeds") or sorted({r.seed for r in inp.runs})
    rows.append(["seeds", ", ".join(map(str, seeds))])
    rows.append(["fit", f"{inp.fit_note}; bootstrap seed {fit.bootstrap.seed}, schema "
                        f"{fit.schema}"])
    rows += [["software", _versions()], ["Python", f"{platform.python_version()} on {platform.platform()}"],
             *_machine_rows(inp),
             ["report written", f"{_dt.datetime.now(_dt.timezone.utc):%Y-%m-%d %H:%M} UTC"],
             ["depthplan commit", git_commit()]]
    blocks: list[Block] = [("h", 2, "Provenance", "provenance"), ("table", ["item", "value"], rows, "plain")]
    if inp.config_text:
        blocks.append(("pre", "The config as run (config.yaml)", inp.config_text))
    return blocks
