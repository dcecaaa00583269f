"""Inputs and readers shared by the report tests (tests/reporting).

Three inputs: a stored results folder cut from a real demo sweep (tests/data/report-folder, made
by tests/data/make_report_fixture.py), a measurements table, and a results folder of invented runs
(several rate groups, tuning trials, censored and diverged runs, probes) drawn from known laws.
`Page` reads a written report's HTML back (tags, number spans, visible text); `value_at` and
`expected_text` give what a number span should show, computed apart from the report's own lookup.
The report fixtures built from these live in conftest.py.
"""
from __future__ import annotations

import csv
import functools
import json
import math
from html.parser import HTMLParser
from pathlib import Path

import numpy as np

from depthplan.records import RunResult, write_runs_csv

ROOT = Path(__file__).resolve().parents[2]
FIXTURE = ROOT / "tests" / "data" / "report-folder"
N_BOOT = 40
# PNG specification (ISO/IEC 15948, RFC 2083 section 3.1): every PNG file starts with these 8 bytes
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
SVG_NS = "{http://www.w3.org/2000/svg}"     # SVG 1.1 (W3C), the namespace of the root element


# ------------------------------------------------------------------ inputs

def write_table(path: Path) -> Path:
    """An invented measurements table: T = 12000 K^-0.8 with 5 % noise, 4 seeds, depths 1-8;
    one K = 1 run stopped at a budget of 10000 (censored); seconds per update 1 ms + 0.5 ms K."""
    rng = np.random.default_rng(3)
    with path.open("w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["depth", "seed", "iterations", "status", "seconds_per_update"])
        for k in (1, 2, 3, 4, 6, 8):
            for s in range(4):
                t = 12000 * k ** -0.8 * math.exp(rng.normal(0, 0.05))
                status = "censored" if k == 1 and s == 0 else "converged"
                w.writerow([k, s, 10000 if status == "censored" else round(t), status,
                            f"{1e-3 * (1 + 0.5 * k):.6f}"])
    return path


def invented_run(depth: int, seed: int, t: float, lr: float, mode: str, budget: int,
                  rng: np.random.Generator, status: str | None = None) -> RunResult:
    """One invented run whose loss falls to 0.1 at T, with probes: each layer's displacement grows
    as t (drift) up to step 50 and as sqrt(t) after it; its SNR falls from +10 to -20 dB there."""
    status = status or ("censored" if t >= budget else "converged")
    steps_run = int(min(t, budget)) if status != "diverged" else 300
    eval_steps = tuple(range(20, steps_run + 1, 20)) or (20,)
    loss = tuple(float(2.3 * math.exp(math.log(0.1 / 2.3) * s / t)) for s in eval_steps)
    probe_steps = tuple(int(s) for s in np.unique(np.geomspace(1, steps_run, 12).astype(int)))
    ts = np.asarray(probe_steps, float)
    disp = np.where(ts <= 50, 0.01 * ts, 0.5 * np.sqrt(ts / 50))
    snr = np.where(ts <= 50, 10.0, -20.0) + rng.normal(0, 0.5, len(ts))
    layers = depth + 1
    return RunResult(depth=depth, width=8, seed=seed, learning_rate=lr, status=status,
                     iterations=steps_run, wall_seconds=steps_run * 1e-4 * (1 + depth),
                     seconds_per_update=1e-4 * (1 + depth), final_train_loss=loss[-1],
                     final_train_accuracy=0.9, validation_accuracy=0.8, n_params=100 * layers,
                     lr_mode=mode, eval_steps=eval_steps, train_loss=loss, probe_steps=probe_steps,
                     displacement=tuple(tuple(float(x) * (1 + j / layers) for x in disp)
                                        for j in range(layers)),
                     snr_db=tuple(tuple(float(x) for x in snr) for _ in range(layers)))


def write_rates_folder(folder: Path) -> Path:
    """Invented runs at depths 1-16: fixed rate 0.02 with T = 14000/K up to K = 10 and rising as
    K^1.5 past it (budget 12000, so K = 1 is censored; one K = 16 run diverged), fixed rate 0.04
    with half those T (T lr K constant), and a tuned rate with T = 5000 K^-0.5; tuning trials and
    two adaptive rounds beside them."""
    rng = np.random.default_rng(7)
    budget, runs = 12000, []

    def fixed_t(k: int, lr: float) -> float:
        base = 14000 / k if k <= 10 else 1400 * (k / 10) ** 1.5
        return base * 0.02 / lr

    for k in (1, 2, 3, 4, 6, 8, 12, 16):
        for s in range(3):
            noise = math.exp(rng.normal(0, 0.05))
            diverged = "diverged" if (k, s) == (16, 2) else None
            runs.append(invented_run(k, s, fixed_t(k, 0.02) * noise, 0.02, "fixed", budget, rng,
                                      diverged))
            runs.append(invented_run(k, s, fixed_t(k, 0.04) * noise, 0.04, "fixed", budget, rng))
            runs.append(invented_run(k, s, 5000 * k ** -0.5 * noise, 0.05 / math.sqrt(k), "tuned",
                                      budget, rng))
    folder.mkdir(parents=True)
    write_runs_csv(runs, folder / "runs.csv")
    (folder / "runs.jsonl").write_text("".join(json.dumps(r.to_dict()) + "\n" for r in runs))
    (folder / "sweep.json").write_text(json.dumps({
        "name": "invented-rates", "fingerprint": "0123456789abcdef", "eval_every": 20,
        "max_updates": budget, "seeds": [0, 1, 2],
        "rounds": [{"reason": "round 1: T still falls at K = 8; adding 12 and 16", "stop": False},
                   {"reason": "round 2: reversal interval narrow enough", "stop": True}]}))
    with (folder / "tuning.csv").open("w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["depth", "trial", "learning_rate", "objective", "statuses"])
        for k in (1, 2, 3, 4, 6, 8, 12, 16):
            for trial, lr in enumerate(0.05 / math.sqrt(k) * np.array([0.25, 0.5, 1.0, 2.0])):
                w.writerow([k, trial, f"{lr:.5f}", f"{5000 * k ** -0.5 * (1 + abs(math.log(lr * math.sqrt(k) / 0.05))):.1f}",
                            "converged converged"])
    return folder


# ------------------------------------------------------------------ reading the HTML back

class Page(HTMLParser):
    """Every tag with its attributes, the number spans, and the visible text."""

    def __init__(self, text: str) -> None:
        super().__init__()
        self.tags: list[tuple[str, dict[str, str]]] = []
        self.numbers: list[tuple[str, str, str]] = []
        self.text: list[str] = []
        self.styles: list[str] = []
        self._span: dict[str, str] | None = None
        self._in_style = False
        self.feed(text)

    def handle_starttag(self, tag, attrs):
        a = {k: v or "" for k, v in attrs}
        self.tags.append((tag, a))
        if tag == "span" and "data-key" in a:
            self._span = {"key": a["data-key"], "fmt": a["data-fmt"], "text": ""}
        self._in_style = tag == "style"

    def handle_endtag(self, tag):
        if tag == "span" and self._span is not None:
            self.numbers.append((self._span["key"], self._span["fmt"], self._span["text"]))
            self._span = None
        self._in_style = False

    def handle_data(self, data):
        if self._span is not None:
            self._span["text"] += data
        if self._in_style:
            self.styles.append(data)
        else:
            self.text.append(data)


def page(paths) -> Page:
    return Page(paths["html"].read_text(encoding="utf-8"))


def value_at(fit: dict, key: str):
    """The value at a dotted key of fit.json (written here, apart from the report's own lookup)."""
    return functools.reduce(lambda v, part: v[int(part)] if isinstance(v, list) else v[part],
                            key.split("."), fit)


def expected_text(value, fmt: str) -> str:
    """`value` as the report should show it: format spec, times the factor after '@' if any."""
    spec, factor = (fmt.split("@") + ["1"])[:2]
    value = value * float(factor)
    return format(round(value) if spec.endswith("d") else value, spec)


ALL_REPORTS = ("folder_report", "table_report", "rates_report")     # the fixtures of conftest.py
