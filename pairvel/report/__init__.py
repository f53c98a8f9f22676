"""The record of a run and everything written from it: tables, FITS, JSON, figures, the report,
blinding and unblinding.

In: a :class:`~pairvel.report.result.RunResult` and an output folder path.
Out: files in a new output folder (tables, figures as PDF + PNG, summary.json, report.md and a
self-contained report.html), claimed before the work, written to a hidden folder and swapped
into place (folders.py).
Depends on every stage below it; nothing below imports from here.
"""

__all__ = ["blinding", "figures", "folders", "html", "outputs", "result"]
