"""report.html: one self-contained page per run, from the Jinja2 template shipped with the package.

The page is built from the same data as report.md (the summary dict, the result and the list of
figures written), not from the Markdown.  Figures are embedded as base64 PNG data URIs and the
style sheet is inline, so the file can be mailed or archived alone and opening it makes no
network request; it holds no script.  Every text is escaped by Jinja2's autoescaping.
"""

from __future__ import annotations

__all__ = ["render_html", "html_context"]

import base64
import json
import math
from pathlib import Path

from ..stats.significance import summary_lines
from .figures import format_tau, pte_flag, template_label

_TEMPLATE = "report.html.j2"
_MAX_LIST = 12  # longer lists of numbers are cut in the generic tables


def fmt(x, digits: int = 3) -> str:
    """A number for a table: ints with thousands separators, floats to ``digits`` significant digits."""
    if x is None:
        return "-"
    if isinstance(x, bool):
        return "yes" if x else "no"
    if isinstance(x, int):
        return f"{x:,}"
    if isinstance(x, float):
        return f"{x:.{digits}g}" if math.isfinite(x) else str(x)
    if isinstance(x, (list, tuple)):
        shown = ", ".join(fmt(v, digits) for v in x[:_MAX_LIST])
        return f"[{shown}{', ...' if len(x) > _MAX_LIST else ''}]"
    return str(x)


def _flatten(d: dict, prefix: str = "") -> list[tuple[str, str]]:
    """(dotted key, formatted value) of a nested dict, for the generic key/value tables."""
    rows = []
    for k, v in d.items():
        key = f"{prefix}{k}"
        if isinstance(v, dict):
            rows += _flatten(v, key + ".")
        elif isinstance(v, list) and v and isinstance(v[0], dict):
            for i, item in enumerate(v):
                rows += _flatten(item, f"{key}[{i}].")
        else:
            rows.append((key, fmt(v)))
    return rows


def _table(columns, rows, *, flags=None) -> dict:
    return {"columns": list(columns), "rows": [[fmt(c) if not isinstance(c, str) else c for c in r] for r in rows],
            "flags": flags or [""] * len(rows)}


def _figures(figures, folder: Path) -> dict:
    """section -> [{src, caption, stem}] with each PNG as a data URI."""
    out = {}
    for f in figures:
        data = base64.b64encode((folder / f.png).read_bytes()).decode("ascii")
        out.setdefault(f.section, []).append({"src": f"data:image/png;base64,{data}", "caption": f.caption,
                                              "stem": f.stem})
    return out


def _assumptions(summary: dict) -> list[tuple[str, str]]:
    """summary["assumptions"] when present, else the bias and the cosmology of the config."""
    if isinstance(summary.get("assumptions"), dict):
        return [(str(k), fmt(v, 6)) for k, v in summary["assumptions"].items()]
    config = summary.get("config", {})
    rows = [("tracer bias (theory.bias)", fmt(config.get("theory", {}).get("bias"), 6))]
    rows += [(f"cosmology.{k}", fmt(v, 6)) for k, v in (config.get("cosmology") or {}).items()]
    return rows


def _headline(result, summary: dict) -> list[tuple[str, str]]:
    f = result.fit
    return [("mean optical depth", format_tau(f.amplitude, f.error)),
            ("signal-to-noise", f"{f.snr:.2f}"),
            *(("empirical significance", line.strip().removeprefix("empirical: "))
              for line in summary_lines(result.extra.get("empirical_significance"), f.snr)),
            ("chi2 against zero", f"{f.chi2_null:.3g} for {f.n_bins} bins (PTE {f.pte_null:.3g})"),
            ("chi2 of the best fit", f"{f.chi2_min:.3g} for {f.dof} dof (PTE {f.pte_min:.3g})"),
            ("model", template_label(result)),
            ("tracers, pairs", f"{result.n_tracers:,} tracers, {int(result.pair_counts.sum()):,} pairs"),
            ("effective redshift", f"{result.z_eff:.3f}"),
            ("aperture radius", f"{result.config.aperture.radius_arcmin:g} arcmin"),
            ("covariance", summary["covariance"]["method"]),
            ("likelihood", f.likelihood)]


def _curve_table(result) -> dict:
    rows = [[result.edges[k], result.edges[k + 1], result.p[k], result.p_err[k], int(result.pair_counts[k]),
             result.model_uk[k], bool(result.in_fit[k])] for k in range(result.edges.size - 1)]
    return _table(["r_min [Mpc]", "r_max [Mpc]", "p [uK]", "error [uK]", "pairs", "model [uK]", "fitted"], rows)


def _null_table(result) -> dict:
    rows, flags = [], []
    for n in result.nulls:
        flag = pte_flag(n.pte_mean)
        rows.append([n.kind, n.description, n.n_real, n.covariance_from, n.chi2_mean, n.dof, n.pte_mean,
                     {"low": "LOW", "high": "HIGH", "": ""}[flag], n.verdict])
        flags.append(flag)
    return _table(["kind", "what", "realisations", "covariance", "chi2 (mean curve)", "dof", "PTE", "PTE flag",
                   "result"], rows, flags=flags)


def _significance_table(result) -> dict | None:
    entries = result.extra.get("empirical_significance")
    if not entries:
        return None
    rows = [[e["source"], e["n"], e["exceeded_by"], ("<= " if e["p_is_bound"] else "") + fmt(e["p_value"]),
             e["amplitude_mean"], e["amplitude_std"], e["snr"]] for e in entries]
    return _table(["curves", "n", "exceeded by", "p", "mean amplitude", "std of amplitudes", "empirical S/N"], rows)


def _covariance_table(result) -> dict | None:
    diag = result.extra.get("covariance_diagnostics")
    if not diag:
        return None
    names, ref = list(diag["errors"]), diag["used"]
    others = [n for n in names if n != ref]
    rows = []
    for k in range(result.edges.size - 1):
        sig = [diag["errors"][n][k] for n in names]
        rows.append([result.edges[k], result.edges[k + 1], *sig, *(diag["errors"][n][k] / diag["errors"][ref][k]
                                                                   for n in others)])
    return _table(["r_min [Mpc]", "r_max [Mpc]", *(f"error {n} [uK]" for n in names), *(f"{n} / {ref}" for n in others)],
                  rows)


def _fit_rows(items, label) -> list:
    return [[*label(item), *((item.fit.amplitude, item.fit.error, item.fit.snr, item.fit.pte_min)
                             if item.fit is not None else ("-",) * 4), item.problem or ""] for item in items]


def _sub_fits(result) -> dict:
    out = {}
    fit_cols = ["tau_mean", "error", "S/N", "PTE of best fit", "note"]
    if "radius_fits" in result.extra:
        out["radii"] = _table(["radius [arcmin]", "main", *fit_cols],
                              _fit_rows(result.extra["radius_fits"], lambda f: (f.radius_arcmin, f.primary)))
    if "proxy_bins" in result.extra:
        out["proxy"] = _table(["proxy from", "proxy to", "median", "tracers", "pairs", *fit_cols],
                              _fit_rows(result.extra["proxy_bins"],
                                        lambda b: (b.proxy_min, b.proxy_max, b.proxy_median, b.n_tracers, b.n_pairs)))
    return out


_RECORDS = (("multifrequency", "Several frequency maps"), ("prefilter", "Map pre-filter"),
            ("demo_check", "Check against the injected truth"), ("velocity_scale_fit", "Joint fit of tau_mean and f sigma_8"))


def _records(summary: dict) -> list[dict]:
    """Further records of summary.json, each as a key/value table."""
    out = [{"title": title, "rows": _flatten(summary[key])} for key, title in _RECORDS
           if isinstance(summary.get(key), dict)]
    spread = summary.get("covariance", {}).get("region_seed_spread")
    if isinstance(spread, dict):
        out.append({"title": "tau_mean over jackknife-region seeds", "rows": _flatten(spread)})
    return out


def _provenance(summary: dict) -> dict:
    prov = summary.get("provenance", {})
    rows = [("config file", fmt(prov.get("config_file"))), ("config sha256", fmt(prov.get("config_sha256"))),
            ("git commit of the config's folder", fmt(prov.get("config_git_commit")))]
    for what in ("catalogue", "map", "mask"):
        item = prov.get(what)
        if isinstance(item, dict):
            rows += [(f"{what} file", fmt(item.get("path"))), (f"{what} sha256", fmt(item.get("sha256")))]
    rows += [("seed", fmt(prov.get("seed"))), ("started (UTC)", fmt(prov.get("started_utc"))),
             ("platform", fmt(prov.get("platform")))]
    text = prov.get("config_text") or json.dumps(summary.get("config", {}), indent=2)
    return {"rows": rows, "versions": [(k, fmt(v)) for k, v in (prov.get("versions") or {}).items()],
            "config_text": text}


def html_context(result, summary: dict, figures, folder) -> dict:
    """Everything the template shows, as plain strings, lists and dicts."""
    return {
        "run_name": result.config.run.name,
        "blinded": bool(summary.get("blinded")),
        "headline": _headline(result, summary),
        "assumptions": _assumptions(summary),
        "figures": _figures(figures, Path(folder)),
        "curve": _curve_table(result),
        "condition_number": fmt(float(summary["covariance"].get("diagnostics", {}).get(
            "condition_number", float("nan")))),
        "covariance_method": summary["covariance"]["method"],
        "covariance_table": _covariance_table(result),
        "nulls": _null_table(result),
        "pte_threshold": fmt(result.config.nulls.pte_threshold),
        "pte_upper": fmt(1.0 - result.config.nulls.pte_threshold),
        "significance": _significance_table(result),
        "selection": [(str(k), fmt(v)) for k, v in result.selection.items()],
        "sub_fits": _sub_fits(result),
        "records": _records(summary),
        "free_sections": dict(result.extra.get("report_sections", {})),
        "warnings": summary.get("run_warnings", []),
        "provenance": _provenance(summary),
    }


def render_html(result, summary: dict, figures, folder) -> str:
    """The text of report.html; the PNG files of ``figures`` are read from ``folder``."""
    import jinja2

    env = jinja2.Environment(loader=jinja2.PackageLoader("pairvel.report", "templates"), autoescape=True,
                             undefined=jinja2.StrictUndefined, trim_blocks=True, lstrip_blocks=True)
    return env.get_template(_TEMPLATE).render(**html_context(result, summary, figures, folder))
