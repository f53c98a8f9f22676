"""One pair pass fed with temperature sets a chunk at a time: memory O(N x chunk), not O(N x sets).

Every temperature set is an independent column of the pair sums, so a pass does not need all
sets at once.  On the linear path (:func:`pairvel.pairs.estimator.linear_geometry`) the pair loop
runs once, before any set, and each chunk of sets becomes its numerators by matrix products as it
arrives; the chunk can then be dropped.  The direct path does every set's arithmetic inside the
pair loop, so it keeps the sets until :meth:`ChunkedPass.result` and runs the loop once then; it
is taken only where the sets fit in one chunk.  Either way the sums are those of one pass over
all sets (``pass_sums`` with the same path) bit for bit, whatever the chunks.
"""

from __future__ import annotations

__all__ = ["ChunkedPass", "WORKING_COPIES", "sets_per_chunk"]

import numpy as np

from ..core.errors import InputError
from .estimator import _numerators_from_columns, _validate, finalise, linear_geometry, linear_is_cheaper, pass_sums

#: Copies of a chunk (sets x N float64) alive at once while it is made and summed: the sets, the
#: trend removal's sorted copy, its means and result, and the engine's gathered columns.
WORKING_COPIES = 6


def sets_per_chunk(n_tracers: int, budget_gb: float) -> int:
    """Temperature sets per chunk so that ``WORKING_COPIES`` copies of a chunk fit in ``budget_gb`` (at least 1)."""
    return max(1, int(budget_gb * 1e9 // (WORKING_COPIES * 8 * max(int(n_tracers), 1))))


class ChunkedPass:
    """A pair pass over ``n_sets`` temperature sets given in chunks of rows, in any order.

    Parameters
    ----------
    positions, edges, regions, redshifts, weights, n_threads
        As in :func:`pairvel.pairs.estimator.pairwise_momentum`.
    n_sets : int
        Rows of the whole (n_sets, N) stack; :meth:`add` must fill each exactly once.
    chunk_sets : int, optional
        The most sets a chunk will hold (None: all in one).  With more sets than that, "auto"
        takes the linear path, whose pair loop runs once however many chunks come.
    method : {"auto", "direct", "linear"}
        "auto" chooses as :func:`pairwise_momentum` does when everything fits in one chunk.
    """

    def __init__(self, positions, edges, n_sets: int, *, regions=None, redshifts=None, weights=None,
                 n_threads=None, method="auto", chunk_sets: int | None = None):
        n = np.asarray(positions).shape[0] if np.ndim(positions) == 2 else 0
        pos, _, _, edges, reg, n_jk, zz, want_z, w = _validate(positions, np.zeros((1, n)), edges, regions,
                                                               redshifts, weights)
        if method not in ("auto", "direct", "linear"):
            raise InputError(f"method must be 'auto', 'direct' or 'linear'; got {method!r}")
        self.n_sets, self.n, self.edges, self.n_jk, self.want_z = int(n_sets), n, edges, n_jk, want_z
        self._inputs = (pos, reg, zz, edges, n_jk, want_z)
        self._weights, self._n_threads, self._method = w, n_threads, method
        one_chunk = chunk_sets is None or self.n_sets <= chunk_sets
        self.linear = n >= 2 and (method == "linear" or (method == "auto" and (
            not one_chunk or linear_is_cheaper(pos, reg, edges, n_jk, self.n_sets))))
        self._filled = np.zeros(self.n_sets, dtype=bool)
        if self.linear:
            self._sums, self._columns = linear_geometry(pos, reg, zz, edges, n_jk, want_z,
                                                        weights=np.ones(n) if w is None else w,
                                                        n_threads=n_threads, n_sets=self.n_sets)
            nbins = edges.size - 1
            self._num = np.zeros((self.n_sets, nbins))
            self._jk_num = np.zeros((max(n_jk, 1), self.n_sets, nbins))
        else:
            self._held = np.empty((self.n_sets, n))

    def add(self, rows, values) -> None:
        """Sum the sets ``values`` (len(rows), N) as rows ``rows`` (a slice or index array) of the stack."""
        idx = np.arange(self.n_sets)[rows]
        t = np.asarray(values, dtype=np.float64).reshape(-1, self.n)
        if t.shape[0] != idx.size:
            raise InputError(f"a chunk of {t.shape[0]} temperature sets was given {idx.size} rows of the stack")
        if self._filled[idx].any():
            raise InputError(f"rows {idx[self._filled[idx]][:5].tolist()} of the stack were given twice")
        if not np.all(np.isfinite(t)):
            bad = np.flatnonzero(~np.all(np.isfinite(t), axis=0))
            raise InputError(f"temperatures must be finite; {bad.size} tracers are not (first: row {bad[0]})")
        if self.linear:
            num, jk_num = _numerators_from_columns(t, self._columns, self.n_jk)
            self._num[idx], self._jk_num[:, idx] = num, jk_num
        else:
            self._held[idx] = t
        self._filled[idx] = True

    @property
    def missing(self) -> int:
        """Rows of the stack not given yet."""
        return int(np.sum(~self._filled))

    def result(self):
        """The :class:`~pairvel.pairs.estimator.PairwiseResult` of every set (rows in stack order)."""
        if self.missing:
            raise InputError(f"{self.missing} of {self.n_sets} temperature sets were never given to the pair pass")
        if self.linear:
            _, den, cnt, zsum, _, jk_den, jk_cnt = self._sums
            sums = (self._num, den, cnt, zsum, self._jk_num, jk_den, jk_cnt)
        else:
            pos, reg, zz, edges, n_jk, want_z = self._inputs
            sums = pass_sums(pos, self._held, reg, zz, edges, n_jk, want_z, weights=self._weights,
                             n_threads=self._n_threads, method=self._method)
            self._held = None
        return finalise(sums, self.edges, single=False, n_jk=self.n_jk, want_z=self.want_z)
