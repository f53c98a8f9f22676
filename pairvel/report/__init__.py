"""The record of a run and everything written from it: tables, FITS, JSON, figures, the report,
blinding and unblinding.

In: a :class:`~pairvel.report.result.RunResult` and an output folder path.
Out: files in a new output folder, written to a temporary folder and renamed into place.
Depends on every stage below it; nothing below imports from here.
"""

__all__ = ["blinding", "outputs", "result"]
