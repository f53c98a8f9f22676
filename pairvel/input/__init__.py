"""What the user gives: the TOML config and the tracer catalogue.

In: a TOML file and a table file (FITS, ECSV, CSV, Parquet).
Out: a validated, frozen :class:`~pairvel.input.config.Config` and a
:class:`~pairvel.input.catalogue.Catalogue` of tracers that passed every check and cut.
Depends on :mod:`pairvel.core` and :mod:`pairvel.model` (the cosmology a config declares).
"""

__all__ = ["catalogue", "config"]
