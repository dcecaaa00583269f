"""Tests of depthplan.reporting.write: the hand-over report as a whole.

The inputs (a stored demo folder, an invented measurements table, an invented folder with several
rate groups) and the HTML reader are in report_data.py, the written reports in conftest.py. The
checks of one part of the report live beside that part's module (test_answer.py, test_tables.py,
test_markup.py, test_figures.py, ...). The sources of outside facts are named beside each check.
"""
from __future__ import annotations

import base64
import json
import math
import os
import re
import shutil
import subprocess
import sys
import time
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pytest

from depthplan.cli import main
from depthplan.records import RunResult, write_runs_csv
from depthplan.reporting.write import ensure_fit, write_report

from report_data import (
    ALL_REPORTS,
    FIXTURE,
    N_BOOT,
    PNG_SIGNATURE,
    ROOT,
    SVG_NS,
    expected_text,
    page,
    value_at,
    write_table,
)

ARTEFACTS = ROOT / "tests" / "artefacts"
CHROMIUM = Path("/usr/bin/chromium")


# ------------------------------------------------------------------ self-contained, embedded

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


def test_stored_folder_report_states_its_cost_basis_and_rate_caution(folder_report):
    _, paths = folder_report
    fit = json.loads(paths["fit"].read_text())
    md = paths["md"].read_text(encoding="utf-8")
    # the accuracy guard judged the fixture's planned depth; warned or not, the table shows it
    assert fit["planning"]["accuracy_check"]["depth"] == fit["planning"]["recommended_depth"]
    # the fixture's runs predate the recorded shape: its config.yaml gives it (synthetic data)
    assert fit["planning"]["cost_basis"] == "flops"
    assert "MFLOP per hidden layer" in md and "64 inputs, hidden width 32, 4 classes, batch 32" in md
    # the fixed part reads "plus x" or "less x", never "plus a fixed -x"
    fixed = fit["planning"]["compute_optimal_depth"]["cost_model"]["intercept"]
    assert ("plus a fixed" if fixed >= 0 else "less a fixed") in md and "fixed -" not in md
    assert "MFLOP per update" in md and "validation accuracy: median (spread over seeds)" in md
    # one fixed rate: the caution says which way T·lr·K went, with the tuning block to fix it
    assert "T·lr·K stays roughly constant" not in md
    change = {"flat": "stays about level", "falling": "falls", "rising": "rises"}
    assert f"T·lr·K {change[fit['rate_effect']['direction']]}" in md
    assert "`train.learning_rate` block" in md


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


@pytest.mark.skipif(not __import__("depthplan.forked").forked.can_fork(), reason="needs two cores and fork")
def test_figures_drawn_in_forked_processes_are_the_bytes_drawn_in_one(tmp_path, monkeypatch):
    """The reference is the plain loop in this process (DEPTHPLAN_SERIAL=1): same figures, same order, same bytes."""
    from depthplan.reporting.write import draw_figures, read_inputs

    folder = tmp_path / "in"
    shutil.copytree(FIXTURE, folder)
    inp = read_inputs(folder, folder / "fit.json", n_boot=N_BOOT)
    made = {}
    for serial in ("1", "0"):
        monkeypatch.setenv("DEPTHPLAN_SERIAL", serial)
        made[serial] = draw_figures(inp, tmp_path / f"figures-{serial}")
    assert len(made["0"]) >= 4
    assert [(f.name, f.title, f.caption, f.alt) for f in made["0"]] == [(f.name, f.title, f.caption, f.alt) for f in made["1"]]
    for a, b in zip(made["0"], made["1"]):
        assert a.png.read_bytes() == b.png.read_bytes() and a.svg.read_bytes() == b.svg.read_bytes()
