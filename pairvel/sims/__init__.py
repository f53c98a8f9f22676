"""Synthetic skies with a known truth: the mock survey writer, the validation runs, the demo check.

In: options for a synthetic survey (footprint, tracer count, injected optical depth, map depth).
Out: catalogue and map files with a truth.json, calibration tables over many mocks, and the
demo's comparison of a run with its truth.
Uses every stage below it to build and measure mocks; no pipeline stage imports from here.
"""

__all__ = ["demo", "mock", "validate"]
