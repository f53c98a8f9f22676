"""The pair engine: comoving positions and the pairwise momentum estimator over every pair.

In: tracer sky positions and redshifts, one or many temperature sets (uK), separation bin
edges (Mpc), optional jackknife regions and weights.
Out: p(r) per set with the pair counts, pair redshifts and every jackknife region's sums
(:class:`~pairvel.pairs.estimator.PairwiseResult`), locally or cut into work units for Dask.
Depends on :mod:`pairvel.core` and :mod:`pairvel.model` (distances).
"""

__all__ = ["distributed", "estimator", "geometry"]
