"""The record of one run: every number the pipeline measured, with the provenance to reproduce it."""

from __future__ import annotations

__all__ = ["RunResult"]

from dataclasses import dataclass, field

import numpy as np

from ..core.constants import C_KM_S, T_CMB_UK
from ..input.config import Config
from ..stats.fit import AmplitudeFit


@dataclass(frozen=True)
class RunResult:
    """Everything a run measured, with the provenance needed to reproduce it."""

    config: Config
    edges: np.ndarray
    p: np.ndarray
    covariance: np.ndarray
    p_jk: np.ndarray
    pair_counts: np.ndarray
    z_eff_bins: np.ndarray
    z_eff: float
    v12_template: np.ndarray
    in_fit: np.ndarray
    fit: AmplitudeFit
    nulls: tuple
    n_tracers: int
    selection: dict
    provenance: dict
    extra: dict = field(default_factory=dict)
    warnings: tuple = ()  # RunWarning of every warning the run raised or logged (pairvel.core.warnlog)
    tracers: object = None  # astropy Table, one row per catalogue row read (pairvel.report.tracers); None if unknown

    @property
    def r_mid(self) -> np.ndarray:
        return 0.5 * (self.edges[1:] + self.edges[:-1])

    @property
    def n_jk(self) -> int:
        """Number of jackknife regions used."""
        return self.p_jk.shape[0]

    @property
    def p_err(self) -> np.ndarray:
        return np.sqrt(np.diag(self.covariance))

    @property
    def template_uk(self) -> np.ndarray:
        """Model curve per unit optical depth, uK: T_CMB v12 / c."""
        return T_CMB_UK * self.v12_template / C_KM_S

    @property
    def model_uk(self) -> np.ndarray:
        """Best-fit model curve, uK."""
        return self.fit.amplitude * self.template_uk
