"""Synthetic skies with a known truth: the mock survey writer, the validation runs, the demo check.

In: options for a synthetic survey (footprint, tracer count, injected optical depth, map depth).
Out: catalogue and map files with a truth.json, calibration tables over many mocks, and the
demo's comparison of a run with its truth, and the tracer signal the simulated-sky covariance can
add to its skies (skysignal).
Uses every stage below it to build and measure mocks; the pipeline imports only the truth check
and the simulated-sky signal from here, never the mock.
"""

__all__ = ["demo", "mock", "skysignal", "validate"]
