"""The report layer: tables, figures, HTML and PDF from Results (results.json) alone.

It never imports the statistics, data or run layers; everything it shows comes from the
plain Results data (and the audit record when one is given).
"""
from __future__ import annotations

from trialcut.report.render import render_documents, render_run

__all__ = ["render_documents", "render_run", "render_comparison", "compare_results", "compare_data_manifests"]


def __getattr__(name: str):
    # The comparison pulls in nothing heavy, but keep the import lazy like the rest.
    if name in ("render_comparison", "compare_results", "compare_data_manifests"):
        from trialcut.report import compare

        return getattr(compare, name)
    raise AttributeError(name)
