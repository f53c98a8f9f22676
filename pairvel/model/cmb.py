"""The primary CMB temperature power spectrum shipped as package data."""

from __future__ import annotations

__all__ = ["load_cmb_cl"]

from importlib import resources

import numpy as np


def load_cmb_cl():
    """The shipped lensed CMB TT power spectrum (see pairvel/data/README.md for how it was made).

    Returns
    -------
    ell : ndarray of shape (8001,), int
        Multipoles 0..8000.
    cl : ndarray of shape (8001,), uK_CMB^2
        C_l (not D_l); zero at ell = 0 and 1.
    """
    text = resources.files("pairvel").joinpath("data/cmb_cl_tt_lensed.txt").read_text()
    table = np.loadtxt(text.splitlines(), comments="#")
    return table[:, 0].astype(int), table[:, 1]
