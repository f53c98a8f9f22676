"""Pool `pairvel validate` output folders per mock family and print the README's "two families" figures.

Usage:
    python benchmarks/validate_families.py OUT1 OUT2 ...

Each OUT is a folder written by `pairvel validate --family {points,cells}` with the trend removal on (the
default), so that every mock holds its noiseless curve with and without the removal.  Per family it prints
the number of mocks and their seeds, the mean noiseless amplitude over the truth with its standard error
(trend removal on: template x predicted loss; off: plain template; the cells family's template includes its
window), the per-bin mean noiseless curve over tau x template, and the fraction of the noiseless signal the
trend removal keeps per bin, measured (ratio of the mean curves) and predicted (model/trendmodel.py).
"""

from __future__ import annotations

import json
import math
import sys
from pathlib import Path

import numpy as np
from astropy.table import Table, vstack


def _load(folders):
    by_family = {}
    for folder in folders:
        folder = Path(folder)
        record = json.loads((folder / "summary.json").read_text())
        opt = record["provenance"]["options"]
        table = Table.read(folder / "mocks.ecsv")
        key = (opt["family"], opt["box_padding"], bool(opt.get("paired_exact", False)))
        entry = by_family.setdefault(key, {"tables": [], "seeds": [], "tau": opt["tau_mean"],
                                           "edges": np.array(record["edges_mpc"])})
        entry["tables"].append(table)
        entry["seeds"].append(f"{opt['seed']} ({len(table)})")
    return by_family


def _mean_se(x):
    return float(np.mean(x)), float(np.std(x, ddof=1) / math.sqrt(x.size))


def _fmt(values, digits=3):
    return ", ".join(f"{v:.{digits}f}" for v in values)


def _kept(kept, plain):
    """Mean noiseless curve with the trend removal over the one without, per bin, and its delta-method error."""
    n = kept.shape[0]
    r = kept.mean(axis=0) / plain.mean(axis=0)
    cov = np.sum((kept - kept.mean(axis=0)) * (plain - plain.mean(axis=0)), axis=0) / (n - 1)
    var = kept.var(axis=0, ddof=1) - 2 * r * cov + r**2 * plain.var(axis=0, ddof=1)
    return r, np.sqrt(np.maximum(var, 0) / n) / np.abs(plain.mean(axis=0))


def main(argv) -> int:
    groups = _load(argv)
    for (family, padding, paired), entry in sorted(groups.items()):
        t = vstack(entry["tables"], metadata_conflicts="silent")
        tau, n = entry["tau"], len(t)
        print(f"family {family}{' (paired)' if paired else ''}, box padding {padding}: {n} mocks; "
              f"seeds (mocks) {', '.join(entry['seeds'])}")
        for label, col in (("trend removed, template x predicted loss", "signal_tau_hat"),
                           ("no trend removal, plain template", "notrend_signal_tau_hat")):
            m, se = _mean_se(np.asarray(t[col]) / tau)
            print(f"  noiseless amplitude / truth, {label}: {m:.4f} +- {se:.4f} (scatter {se * math.sqrt(n):.3f})")
        template = np.asarray(t["template_uk"])
        transfer = np.asarray(t["trend_transfer"])
        for label, curve, tmpl in (("trend removed", "signal_p_uk", template),
                                   ("no trend removal", "notrend_signal_p_uk", template / transfer)):
            ratio = np.asarray(t[curve]) / (tau * tmpl)
            mean, se = ratio.mean(axis=0), ratio.std(axis=0, ddof=1) / math.sqrt(n)
            print(f"  per bin, mean curve / (tau x template), {label}: {_fmt(mean)}")
            print(f"    standard errors: {_fmt(se)}")
        r, se = _kept(np.asarray(t["signal_p_uk"]), np.asarray(t["notrend_signal_p_uk"]))
        print(f"  signal kept by the trend removal, measured:  {_fmt(r)}")
        print(f"    standard errors:                          {_fmt(se)}")
        print(f"  signal kept by the trend removal, predicted: {_fmt(transfer.mean(axis=0))}")
        if paired:
            m, se = _mean_se(np.asarray(t["exact_signal_tau_hat"]) / tau)
            print(f"  paired exact velocities, noiseless amplitude / truth: {m:.4f} +- {se:.4f}")
            d, dse = _mean_se((np.asarray(t["signal_tau_hat"]) - np.asarray(t["exact_signal_tau_hat"])) / tau)
            print(f"  cell velocities minus paired exact ones (each against its own window): {d:+.4f} +- {dse:.4f}")
        if "cell_window" in t.colnames:
            print(f"  cell window applied to the template: {_fmt(np.asarray(t['cell_window'])[0], 4)}")
    for family in sorted({key[0] for key in groups}):
        tables = [t for key, e in groups.items() if key[0] == family for t in e["tables"]]
        tau = next(e["tau"] for key, e in groups.items() if key[0] == family)
        for label, col in (("trend removed", "signal_tau_hat"), ("no trend removal", "notrend_signal_tau_hat")):
            x = np.concatenate([np.asarray(t[col]) for t in tables]) / tau
            m, se = _mean_se(x)
            print(f"family {family}, all {x.size} mocks, {label}: {m:.4f} +- {se:.4f}")
        r, se = _kept(*(np.concatenate([np.asarray(t[c]) for t in tables]) for c in ("signal_p_uk", "notrend_signal_p_uk")))
        pred = np.concatenate([np.asarray(t["trend_transfer"]) for t in tables]).mean(axis=0)
        print(f"family {family}, all mocks, kept measured:  {_fmt(r)}\n    standard errors: {_fmt(se)}\n"
              f"    predicted: {_fmt(pred)}")
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
