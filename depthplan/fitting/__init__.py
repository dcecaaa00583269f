"""The fit wing: read runs or tables, fit the depth law, reversal and planning figures (numpy/scipy only).

Modules: `inputs` (results folders and measurement tables), `estimators` (Tobit, OLS, broken
stick, two-term, saturating, AICc), `stuck` (censored runs far past their siblings),
`selection` (the models compared by AICc, reselecting bootstrap, lack of fit), `depthlaw` (per-depth summaries, bootstrap, power-law and reversal blocks),
`planning` (last depth worth adding, compute-optimal depth, total-cost curve), `diffusion`
(probe measures), `summary` (warnings and the text the CLI prints), `assemble` (fit.json).
This package never imports torch or matplotlib; its public names are re-exported here, which
also keeps the old `depthplan.fitting` import path working.
"""
from .assemble import SCHEMA, default_json_path, fit_path, fit_runs, power_law_curve
from .depthlaw import summarize_depths
from .diffusion import diffusion_summary, growth_exponent, snr_drop_db, transition_step
from .estimators import (
    PowerLawFit,
    SaturatingFit,
    SegmentedFit,
    TwoTermFit,
    aicc,
    bic,
    fit_power_law,
    fit_saturating,
    fit_segmented,
    fit_two_term,
)
from .inputs import load_runs
from .planning import (
    compute_optimal_depth,
    depths_in_gaps,
    fit_cost_model,
    last_depth_worth_adding,
    log_t_curve,
)
from .stuck import find_stuck
from .summary import format_summary

__all__ = [
    "SCHEMA", "fit_runs", "fit_path", "default_json_path", "power_law_curve", "load_runs",
    "PowerLawFit", "SegmentedFit", "TwoTermFit", "fit_power_law", "fit_segmented", "fit_two_term", "bic",
    "summarize_depths", "log_t_curve", "last_depth_worth_adding", "compute_optimal_depth",
    "fit_cost_model", "growth_exponent", "transition_step", "snr_drop_db", "diffusion_summary",
    "format_summary", "SaturatingFit", "fit_saturating", "aicc", "depths_in_gaps", "find_stuck",
]
