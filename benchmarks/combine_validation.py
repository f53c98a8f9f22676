"""Summarise several `pairvel validate` folders as one set of mocks.

Long calibrations run as chunks (each its own seed, so the mocks are independent) that each write
their folder as they finish; this script stacks their mocks.ecsv rows and prints the summary
`pairvel validate` would have printed for all of them at once.

    python benchmarks/combine_validation.py OUT1 OUT2 ... [--json combined.json]

Every folder must come from the same options apart from the seed and the number of mocks.
"""

from __future__ import annotations

import argparse
import json
import sys
from dataclasses import replace
from pathlib import Path

import numpy as np
from astropy.table import Table

from pairvel.sims.mock import _plain
from pairvel.sims.validate import ValidationOptions, ValidationResult, format_summary, summarise


def combine(folders) -> ValidationResult:
    rows, options, seeds = {}, None, []
    for folder in folders:
        if not (Path(folder) / "summary.json").exists():  # a chunk still running (its folder is claimed)
            print(f"combine_validation: skipping {folder}: no summary.json", file=sys.stderr)
            continue
        record = json.loads((Path(folder) / "summary.json").read_text())
        opts = dict(record["provenance"]["options"])
        seeds.append(opts.pop("seed"))
        opts.pop("n_mocks")
        if options is None:
            options = opts
        elif opts != options:
            diff = sorted(k for k in opts if opts[k] != options.get(k))
            sys.exit(f"combine_validation: {folder} differs from the first folder in {diff}")
        table = Table.read(Path(folder) / "mocks.ecsv", format="ascii.ecsv")
        for name in table.colnames:
            rows.setdefault(name, []).append(np.asarray(table[name]))
    rows = {k: np.concatenate(v) for k, v in rows.items()}
    fields = {k: (float("inf") if v is None and k == "fit_r_max_mpc" else v) for k, v in options.items()}
    opt = replace(ValidationOptions(**fields), n_mocks=int(rows["tau_hat"].size), seed=int(seeds[0]))
    summary = summarise(rows, opt)
    summary["seeds"] = seeds
    edges = opt.edges()
    return ValidationResult(opt, edges, rows, summary,
                            {"options": _plain({**options, "seed": seeds[0], "n_mocks": opt.n_mocks}), "seeds": seeds})


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("folders", nargs="+")
    ap.add_argument("--json", help="also write the combined summary here")
    args = ap.parse_args(argv)
    result = combine(args.folders)
    print(format_summary(result))
    print(f"  seeds: {result.summary['seeds']}")
    if args.json:
        Path(args.json).write_text(json.dumps(_plain({"summary": result.summary, "edges_mpc": result.edges.tolist(),
                                                      "provenance": result.provenance}), indent=2) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
