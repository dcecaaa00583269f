"""A fit's view in a notebook cell: the answer and the fit table as one self-contained HTML fragment.

The same blocks as the report's answer section and fit table (reporting.answer, reporting.tables),
rendered by the report's own HTML renderer, inside a <div> with its own scoped style; no figure,
script, font or link to anything outside the fragment.
"""
from __future__ import annotations

from pathlib import Path

from ..fit_record import FitResult
from .answer import answer_blocks
from .inputs import ReportInputs
from .markup import Words, html_body
from .tables import fit_table_blocks, warning_blocks

__all__ = ["fit_html"]

_STYLE = (".depthplan-fit{font:14px/1.45 system-ui,sans-serif;max-width:52em}"
          ".depthplan-fit p.answer{font-size:1.1em}.depthplan-fit p.caution{color:#7a4b00}"
          ".depthplan-fit table{border-collapse:collapse}.depthplan-fit td,.depthplan-fit th"
          "{padding:2px 8px;border-bottom:1px solid #ddd;text-align:left}"
          ".depthplan-fit .badge{font-size:.8em;padding:0 4px;border:1px solid #b35c00;color:#b35c00}")


def fit_html(result: FitResult) -> str:
    """HTML for a fit: the depth to plan for, why, how sure, the fit table, warnings."""
    fit = result.to_dict()            # the number references name paths into the dict
    inp = ReportInputs(path=Path(str(result.source or "table")), kind="table", fit=fit,
                       fit_note="", runs=[])
    w = Words(fit)
    blocks = answer_blocks(inp, w) + fit_table_blocks(inp, w) + warning_blocks(inp, w)
    return f'<div class="depthplan-fit"><style>{_STYLE}</style>\n{html_body(blocks, fit)}\n</div>'
