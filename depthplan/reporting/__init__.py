"""The report wing: figures onto given Axes, text blocks, Markdown and self-contained HTML.

Modules: `inputs` (what a report is made from), `markup` (blocks to Markdown/HTML), `answer`
(the answer in plain words), `tables` (per-depth, fit, rate and provenance tables), `figures`
and `dynamics_figures` (matplotlib), `write` (loads, fits when needed, writes the files).
Imports the base and depthplan.fitting only; never torch.
"""
from .write import write_report

__all__ = ["write_report"]
