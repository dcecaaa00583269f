"""Tests of depthplan.reporting.write: the hand-over report.

Three inputs: a stored results folder cut from a real demo sweep
(tests/data/report-folder, made by tests/data/make_report_fixture.py), a
measurements table, and a results folder of invented runs (several rate
groups, tuning trials, censored and diverged runs, probes) drawn from known
laws. The sources of outside facts are named beside each check.
"""
from __future__ import annotations

import base64
import csv
import functools
import json
import math
import os
import re
import shutil
import subprocess
import sys
import time
import xml.etree.ElementTree as ET
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from matplotlib.figure import Figure

from depthplan.cli import main
from depthplan.fit_record import FitGroup
from depthplan.reporting.figures import plot_scaling
from depthplan.records import RunResult, write_runs_csv
from depthplan.reporting.write import ensure_fit, write_report

ROOT = Path(__file__).resolve().parents[2]
FIXTURE = ROOT / "tests" / "data" / "report-folder"
ARTEFACTS = ROOT / "tests" / "artefacts"
CHROMIUM = Path("/usr/bin/chromium")
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


def _invented_run(depth: int, seed: int, t: float, lr: float, mode: str, budget: int,
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
            runs.append(_invented_run(k, s, fixed_t(k, 0.02) * noise, 0.02, "fixed", budget, rng,
                                      diverged))
            runs.append(_invented_run(k, s, fixed_t(k, 0.04) * noise, 0.04, "fixed", budget, rng))
            runs.append(_invented_run(k, s, 5000 * k ** -0.5 * noise, 0.05 / math.sqrt(k), "tuned",
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


@pytest.fixture(scope="module")
def folder_report(tmp_path_factory):
    folder = tmp_path_factory.mktemp("stored") / "demo"
    shutil.copytree(FIXTURE, folder)
    return folder, write_report(folder, n_boot=N_BOOT)


@pytest.fixture(scope="module")
def table_report(tmp_path_factory):
    table = write_table(tmp_path_factory.mktemp("table") / "timings.csv")
    return table, write_report(table, n_boot=N_BOOT)


@pytest.fixture(scope="module")
def rates_report(tmp_path_factory):
    folder = write_rates_folder(tmp_path_factory.mktemp("rates") / "invented")
    return folder, write_report(folder, n_boot=N_BOOT)


ALL_REPORTS = ("folder_report", "table_report", "rates_report")


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


# ------------------------------------------------------------------ self-contained, embedded

@pytest.mark.parametrize("report", ALL_REPORTS)
def test_html_is_self_contained(report, request):
    _, paths = request.getfixturevalue(report)
    p = page(paths)
    # HTML: a data: URI needs no fetch (RFC 2397); a fragment link (#id) stays in the page (RFC 3986 4.4)
    for tag, attrs in p.tags:
        assert tag not in ("script", "link", "iframe", "object", "embed", "base"), tag
        for name in ("src", "href", "srcset", "poster", "data", "action", "formaction", "xlink:href"):
            if name in attrs:
                assert attrs[name].startswith(("data:", "#")), (tag, name, attrs[name][:80])
    css = "".join(p.styles)
    # CSS: url() and @import are the only ways a style sheet fetches (CSS 2.1, sections 4.3.4, 6.3)
    assert "url(" not in css and "@import" not in css
    csp = [a["content"] for t, a in p.tags if t == "meta" and a.get("http-equiv") == "Content-Security-Policy"]
    assert csp and "default-src 'none'" in csp[0]


@pytest.mark.parametrize("report", ALL_REPORTS)
def test_every_figure_is_written_twice_and_embedded(report, request):
    _, paths = request.getfixturevalue(report)
    pngs = [f for f in paths["figures"] if f.suffix == ".png"]
    svgs = [f for f in paths["figures"] if f.suffix == ".svg"]
    assert pngs and sorted(f.stem for f in pngs) == sorted(f.stem for f in svgs)
    embedded = [base64.b64decode(a["src"].split(",", 1)[1]) for t, a in page(paths).tags
                if t == "img" and a.get("src", "").startswith("data:image/png;base64,")]
    assert sorted(embedded) == sorted(f.read_bytes() for f in pngs)
    for f in pngs:
        assert f.read_bytes()[:8] == PNG_SIGNATURE
    for f in svgs:
        assert ET.parse(f).getroot().tag == f"{SVG_NS}svg"
    md = paths["md"].read_text(encoding="utf-8")
    for f in pngs:
        assert f"(figures/{f.name})" in md


# ------------------------------------------------------------------ the numbers are the fit's

@pytest.mark.parametrize("report", ALL_REPORTS)
def test_numbers_in_the_text_equal_fit_json(report, request):
    _, paths = request.getfixturevalue(report)
    fit = json.loads(paths["fit"].read_text())
    numbers = page(paths).numbers
    assert len(numbers) > 30
    for key, fmt, shown in numbers:
        assert shown == expected_text(value_at(fit, key), fmt), key
    keys = {k for k, _, _ in numbers}
    assert {"planning.recommended_depth", "power_law.slope", "power_law.slope_ci.0",
            "power_law.slope_ci.1", "planning.last_depth_worth_adding.depth"} <= keys
    if fit["power_law"]["alpha"] is not None:
        assert {"power_law.alpha", "power_law.alpha_ci.0", "power_law.alpha_ci.1"} <= keys
    if fit["reversal"]["status"] == "observed":
        assert {"reversal.depth", "reversal.depth_ci.0", "reversal.depth_ci.1"} <= keys
    # the Markdown says the same as the HTML
    md = paths["md"].read_text(encoding="utf-8")
    rec = fit["planning"]["recommended_depth"]
    assert f"**Plan for {rec} hidden layers**" in md
    assert f"s = {fit['power_law']['slope']:.2f}" in md


def test_stored_folder_report_answers_first_and_gives_provenance(folder_report):
    folder, paths = folder_report
    fit = json.loads(paths["fit"].read_text())
    assert paths["fit"] == folder / "fit.json" and paths["html"].parent == folder
    text = "".join(page(paths).text)
    assert text.index("Plan for") < text.index("Figure 1.")
    assert "advice from small proxies can mislead a costly decision" in text
    assert f"K* ≈ {fit['reversal']['depth']:.1f}" in text      # the fixture's reversal is observed
    assert "No figure in this report lies outside the swept depths" in text
    info = json.loads((folder / "sweep.json").read_text())
    assert info["fingerprint"] in text and "0, 1, 2" in text
    assert "numpy " in text and "matplotlib " in text and "depthplan commit" in text
    assert "train_loss_below: 0.1" in text                     # the config as run
    names = {f.stem for f in paths["figures"]}
    assert {"scaling", "cost", "loss", "dynamics"} <= names


def test_report_leads_with_the_accuracy_warning(tmp_path):
    # Invented table: a clean law T = 8000 K^-0.7 plans deep, where validation accuracy is clearly
    # worse (every seed at K >= 8 below every seed at K <= 4).
    rng = np.random.default_rng(3)
    rows = ["depth,seed,iterations,validation_accuracy"]
    for k in (1, 2, 4, 8, 16):
        for s in range(3):
            acc = (0.90 if k <= 4 else 0.70) + 0.005 * s
            rows.append(f"{k},{s},{int(8000 * k ** -0.7 * math.exp(rng.normal(0, 0.03)))},{acc}")
    table = tmp_path / "acc.csv"
    table.write_text("\n".join(rows) + "\n")
    paths = write_report(table, n_boot=100)
    fit = json.loads(paths["fit"].read_text())
    check = fit["planning"]["accuracy_check"]
    assert check["clearly_below"] and "clearly lower validation accuracy" in fit["warnings"][0]
    md = paths["md"].read_text(encoding="utf-8")
    answer = md.split("## The answer", 1)[1].split("\n\n")
    lead = [b.strip().lstrip("> ") for b in answer if b.strip()][:3]
    assert lead[0].startswith("**Plan for") and lead[1].startswith("**Accuracy warning.**")
    assert f"K = {check['best_depth']}" in lead[1]


def test_stored_folder_report_states_its_cost_basis_and_rate_caution(folder_report):
    _, paths = folder_report
    fit = json.loads(paths["fit"].read_text())
    md = paths["md"].read_text(encoding="utf-8")
    # the accuracy guard judged the fixture's planned depth; warned or not, the table shows it
    assert fit["planning"]["accuracy_check"]["depth"] == fit["planning"]["recommended_depth"]
    # the fixture's runs predate the recorded shape: its config.yaml gives it (synthetic data)
    assert fit["planning"]["cost_basis"] == "flops"
    assert "MFLOP per hidden layer" in md and "64 inputs, hidden width 32, 4 classes, batch 32" in md
    assert "MFLOP per update" in md and "validation accuracy: median (spread over seeds)" in md
    # one fixed rate: the caution says which way T·lr·K went, with the tuning block to fix it
    assert "T·lr·K stays roughly constant" not in md
    change = {"flat": "stays about level", "falling": "falls", "rising": "rises"}
    assert f"T·lr·K {change[fit['rate_effect']['direction']]}" in md
    assert "`train.learning_rate` block" in md


def test_stored_folder_report_shows_the_snr_drop_per_depth(folder_report):
    _, paths = folder_report
    by_depth = json.loads(paths["fit"].read_text())["diffusion"]["by_depth"]
    figure = next(p for p in paths["figures"] if p.name == "dynamics-by-depth.png")
    assert figure.read_bytes()[:8] == PNG_SIGNATURE
    md = paths["md"].read_text(encoding="utf-8")
    drops = [r for r in by_depth if r["snr_drop_db"] is not None]
    # the sentence quotes fit.json's drops at the shallowest and deepest depths
    assert (f"the median SNR drop is {drops[0]['snr_drop_db']:.1f} dB at K = {drops[0]['depth']} "
            f"and {drops[-1]['snr_drop_db']:.1f} dB at K = {drops[-1]['depth']}") in md
    # brute force over fit.json's rows: the first depth from which every drop is under 2 dB
    flat = next(r["depth"] for i, r in enumerate(drops)
                if all(q["snr_drop_db"] < 2.0 for q in drops[i:]))
    assert f"From K = {flat} on, the gradient SNR does not drop (median drop under 2 dB)." in md


def test_table_report_goes_beside_the_table_and_marks_extrapolation(table_report):
    table, paths = table_report
    assert paths["html"].parent == table.with_name("timings-report")
    assert paths["fit"] == table.with_name("timings-report") / "fit.json"
    fit = json.loads(paths["fit"].read_text())
    worth = fit["planning"]["last_depth_worth_adding"]
    assert worth["extrapolated"] and worth["depth"] > max(fit["depths_swept"])
    html_text = paths["html"].read_text()
    shown = f'data-key="planning.last_depth_worth_adding.depth" data-fmt="d">{worth["depth"]}</span>'
    assert shown + '<span class="badge">extrapolated</span>' in html_text
    md = paths["md"].read_text()
    assert f"K = {worth['depth']}" in md and "[extrapolated]" in md
    assert "What was measured." in md and "{" not in md.split("## Provenance")[0]
    assert {f.stem for f in paths["figures"]} == {"scaling", "cost"}   # a table has no curves


def test_rate_groups_tuning_and_rounds_are_shown(rates_report):
    folder, paths = rates_report
    fit = json.loads(paths["fit"].read_text())
    assert len(fit["by_learning_rate"]) == 3 and fit["lr_interaction"]["lr_exponent"] is not None
    names = {f.stem for f in paths["figures"]}
    assert {"scaling", "rates", "tuning", "dynamics", "loss"} <= names
    text = "".join(page(paths).text)
    assert "depth partly acts as a learning-rate multiplier" in text
    assert "fixed rate 0.02" in text and "rate tuned per depth" in text
    assert "round 2: reversal interval narrow enough" in text
    assert "Tuning trials" in text
    # the headline and the per-depth table follow the tuned rate (records.primary_group)
    assert fit["group"]["lr_mode"] == "tuned"
    assert "the answer at the top is for the rate tuned per depth" in text
    assert "the answer at the top uses the tuned rate" in text


def test_scaling_plot_draws_censored_and_diverged_runs_as_such(rates_report):
    folder, paths = rates_report
    fit = json.loads(paths["fit"].read_text())
    group = fit["by_learning_rate"][0]
    assert group["group"]["learning_rate"] == 0.02
    from depthplan.fitting.inputs import load_runs
    runs = load_runs(folder)
    ax = Figure().subplots()
    group = FitGroup.from_dict(group)
    drawn = {a.get_label(): a for a in plot_scaling(group, runs, ax, groups=[group])}
    at = [r for r in runs if r.lr_mode == "fixed" and r.learning_rate == 0.02]
    n_cens = sum(r.status == "censored" for r in at)
    n_div = sum(r.status == "diverged" for r in at)
    assert n_cens == 3 and n_div == 1
    assert len(drawn["censored run: T ≥ budget"].get_offsets()) == n_cens
    assert len(drawn["diverged run (no T)"].get_offsets()) == n_div
    assert len(drawn["one run (seed)"].get_offsets()) == len(at) - n_cens - n_div


# ------------------------------------------------------------------ fit.json: reused or refitted

def test_fit_is_reused_while_fresh_and_refitted_when_stale(tmp_path):
    folder = tmp_path / "demo"
    shutil.copytree(FIXTURE, folder)
    fit_file = folder / "fit.json"
    _, note = ensure_fit(folder, fit_file, n_boot=20)
    assert note.startswith("fitted now") and "there was none" in note
    stored = json.loads(fit_file.read_text())
    stored["warnings"] = ["marker: this fit was reused"]
    fit_file.write_text(json.dumps(stored))
    fit, note = ensure_fit(folder, fit_file, n_boot=20)
    assert note.startswith("reused") and fit["warnings"] == ["marker: this fit was reused"]
    later = time.time() + 5
    os.utime(folder / "runs.jsonl", (later, later))
    fit, note = ensure_fit(folder, fit_file, n_boot=20)
    assert "runs.jsonl changed" in note and fit["warnings"] != ["marker: this fit was reused"]
    stored = json.loads(fit_file.read_text())
    stored["schema"] = "depthplan-fit/0"
    fit_file.write_text(json.dumps(stored))
    _, note = ensure_fit(folder, fit_file, n_boot=20)
    assert "schema" in note
    assert json.loads(fit_file.read_text())["schema"] == "depthplan-fit/2"


def test_a_refit_keeps_the_cost_basis_the_stored_fit_asked_for(tmp_path):
    folder = tmp_path / "demo"
    shutil.copytree(FIXTURE, folder)
    fit_file = folder / "fit.json"
    assert main(["fit", str(folder), "--cost", "seconds", "--bootstrap", "20"]) == 0
    assert json.loads(fit_file.read_text())["planning"]["cost_basis"] == "seconds"
    later = time.time() + 5
    os.utime(folder / "runs.jsonl", (later, later))
    fit, note = ensure_fit(folder, fit_file, n_boot=20)
    assert note.startswith("fitted now") and fit["planning"]["cost_basis"] == "seconds"
    fit_file.unlink()
    fit, _ = ensure_fit(folder, fit_file, n_boot=20)
    assert fit["planning"]["cost_basis"] == "flops"              # the default


def test_report_command_writes_beside_a_table_and_says_where(tmp_path, capsys):
    table = write_table(tmp_path / "jobs.csv")
    assert main(["report", str(table), "--out", str(tmp_path / "rep")]) == 0
    out = capsys.readouterr().out
    assert str(tmp_path / "rep" / "report.html") in out
    assert (tmp_path / "rep" / "fit.json").is_file() and (tmp_path / "rep" / "figures" / "scaling.svg").is_file()


def test_importing_reporting_leaves_torch_out():
    code = "import sys, depthplan.reporting.write; print('torch' in sys.modules)"
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert done.stdout.strip() == "False"


# ------------------------------------------------------------------ headless Chromium

# Reports load failures, script errors and blocked fetches into the page, then the images' sizes.
_PROBE = """<script>
window.__problems = [];
console.error = function () { window.__problems.push('console.error: ' + Array.from(arguments).join(' ')); };
window.addEventListener('error', function (e) {
  window.__problems.push('error: ' + (e.message || (e.target && (e.target.src || e.target.href)) || '?'));
}, true);
document.addEventListener('securitypolicyviolation', function (e) {
  window.__problems.push('blocked fetch: ' + e.blockedURI);
});
window.addEventListener('load', function () {
  var sizes = Array.from(document.images).map(function (i) {
    var r = i.getBoundingClientRect();
    return [i.naturalWidth, i.naturalHeight, r.width, r.height, i.complete];
  });
  var out = document.createElement('pre');
  out.id = 'probe-result';
  out.textContent = JSON.stringify({images: sizes, problems: window.__problems});
  document.body.appendChild(out);
});
</script>"""

_FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
          "--disable-background-networking", "--disable-component-update", "--disable-sync"]


def _chromium(tmp_path: Path, *args: str) -> subprocess.CompletedProcess:
    profile = tmp_path / f"profile-{len(list(tmp_path.iterdir()))}"
    return subprocess.run([str(CHROMIUM), *_FLAGS, f"--user-data-dir={profile}", *args],
                          capture_output=True, text=True, timeout=120)


def test_report_renders_in_headless_chromium(folder_report, tmp_path):
    if not CHROMIUM.exists():
        pytest.skip("headless Chromium check skipped: /usr/bin/chromium is missing "
                    "(apt-get install chromium; .ci/run installs it)")
    _, paths = folder_report
    html_text = paths["html"].read_text(encoding="utf-8")
    # a test-only copy: the same page, with a probe script allowed by its policy
    probed = html_text.replace("style-src 'unsafe-inline'", "style-src 'unsafe-inline'; script-src 'unsafe-inline'", 1)
    probed = probed.replace("</title>", "</title>\n" + _PROBE, 1)
    copy = tmp_path / "probed.html"
    copy.write_text(probed, encoding="utf-8")
    done = _chromium(tmp_path, "--enable-logging=stderr", "--v=0", "--virtual-time-budget=5000",
                     "--window-size=1100,900", "--dump-dom", copy.as_uri())
    found = re.search(r'<pre id="probe-result">(.*?)</pre>', done.stdout, re.S)
    assert found, done.stderr[-2000:]
    result = json.loads(found[1].replace("&quot;", '"').replace("&amp;", "&"))
    assert result["problems"] == []
    # Chromium logs each console message of a page as "CONSOLE" on stderr with --enable-logging
    assert [line for line in done.stderr.splitlines() if ":CONSOLE" in line] == []
    n_png = sum(f.suffix == ".png" for f in paths["figures"])
    assert len(result["images"]) == n_png
    for natural_w, natural_h, shown_w, shown_h, complete in result["images"]:
        assert complete and natural_w > 0 and natural_h > 0 and shown_w > 0 and shown_h > 0
    ARTEFACTS.mkdir(exist_ok=True)
    shot = ARTEFACTS / "report.png"
    shot.unlink(missing_ok=True)
    done = _chromium(tmp_path, "--hide-scrollbars", "--window-size=1100,5000",
                     f"--screenshot={shot}", paths["html"].as_uri())
    assert shot.is_file() and shot.read_bytes()[:8] == PNG_SIGNATURE, done.stderr[-2000:]


def _probed_folder(folder: Path, with_information: bool = True) -> Path:
    """Invented runs at K = 1, 2, 4, 8 (3 seeds) with T = 8000 / K (s = -1, so alpha = 1/2) and
    probes on the trainer's grid up to each T: displacement sqrt(t) (a random walk's law, Feller
    vol. 1, so the late exponent is exactly 1/2); with information, I(X;T) rising then falling and
    I(T;Y) rising along the SNR steps."""
    from depthplan.train.probes import probe_grids, run_probe_steps

    rng = np.random.default_rng(5)
    budget = 20000
    dense, sparse = probe_grids(budget, 24)
    runs = []
    for k in (1, 2, 4, 8):
        for s in range(3):
            t = int(round(8000 / k * math.exp(rng.normal(0, 0.05)) / 20)) * 20
            steps, snr_steps = run_probe_steps(dense, t), run_probe_steps(sparse, t)
            x = np.log(np.asarray(snr_steps, float)) / math.log(t)            # 0 .. 1 along the run
            layers = k + 1
            info = {} if not with_information else {
                "information_xt": tuple(tuple(float(8 - j * 0.5 + 2 * v - 3 * v * v) for v in x)
                                        for j in range(layers)),
                "information_ty": tuple(tuple(float(0.5 + 2.5 * v) for v in x) for _ in range(layers))}
            runs.append(RunResult(
                depth=k, width=8, seed=s, learning_rate=0.02, status="converged", iterations=t,
                wall_seconds=t * 1e-4, seconds_per_update=1e-4 * (1 + k), final_train_loss=0.09,
                final_train_accuracy=0.9, validation_accuracy=0.8, n_params=100 * layers,
                eval_steps=tuple(range(20, t + 1, 20)),
                train_loss=tuple(float(2.3 * math.exp(math.log(0.09 / 2.3) * e / t)) for e in range(20, t + 1, 20)),
                probe_steps=tuple(steps),
                displacement=tuple(tuple(float(math.sqrt(v)) for v in steps) for _ in range(layers)),
                snr_steps=tuple(snr_steps),
                snr_db=tuple(tuple(float(10.0 if v <= 50 else -10.0) for v in snr_steps) for _ in range(layers)),
                **info))
    folder.mkdir(parents=True)
    write_runs_csv(runs, folder / "runs.csv")
    (folder / "runs.jsonl").write_text("".join(json.dumps(r.to_dict()) + "\n" for r in runs))
    (folder / "sweep.json").write_text(json.dumps({"name": "invented-probes", "eval_every": 20,
                                                   "max_updates": budget, "seeds": [0, 1, 2]}))
    return folder


def test_information_plane_only_when_recorded_and_the_late_check_in_words(tmp_path, rates_report):
    with_info = write_report(_probed_folder(tmp_path / "with", True), n_boot=N_BOOT)
    assert "information.png" in {p.name for p in with_info["figures"]}
    assert "information.png" not in {p.name for p in rates_report[1]["figures"]}   # runs without it
    figure = next(p for p in with_info["figures"] if p.name == "information.png")
    assert figure.read_bytes()[:8] == PNG_SIGNATURE
    late = json.loads(with_info["fit"].read_text())["diffusion"]["late_window"]
    # known answers: displacement sqrt(t) gives exactly 1/2 in every window; T ~ K^-1 gives alpha 1/2
    assert late["exponent"] == pytest.approx(0.5, abs=1e-9) and late["verdict"] == "agree"
    md = with_info["md"].read_text(encoding="utf-8")
    assert "the weight displacement grows with exponent 0.50" in md and "The two agree" in md
    assert "Information plane per layer" in md and "Saxe et al. 2018" in md
    from depthplan.fitting import format_summary
    line = next(x for x in format_summary(json.loads(with_info["fit"].read_text())).splitlines()
                if x.startswith("Probes:"))
    assert "(T/2 to T) 0.50" in line and ": agree (the intervals overlap)" in line
