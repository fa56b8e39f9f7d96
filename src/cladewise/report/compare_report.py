"""The report of a LOO model comparison: ``compare_report.html``."""

from __future__ import annotations

from pathlib import Path
from typing import Any, Mapping

import numpy as np
import pandas as pd

from cladewise.errors import InputError
from cladewise.inference.results import atomic_write
from cladewise.report.html import MARKER, esc, figure_html, page, table_html
from cladewise.report.progress import Progress
from cladewise.report.style import LINESTYLES, MARKERS, OKABE_ITO, new_figure, save_figure

__all__ = ["write_comparison_report"]

REPORT_NAME = "compare_report.html"


def _unpack(comparison: Any, influential: Mapping[str, Any] | None) -> tuple[pd.DataFrame, dict[str, Any]]:
    table = comparison
    if not isinstance(comparison, pd.DataFrame):
        table = getattr(comparison, "table", None)
        if influential is None:
            influential = getattr(comparison, "influential", None)
    if not isinstance(table, pd.DataFrame):
        raise InputError("the comparison must be a pandas DataFrame like arviz.compare() returns, "
                         "or an object with a .table DataFrame")
    if "elpd_loo" not in table.columns and "elpd" in table.columns:
        table = table.rename(columns={"elpd": "elpd_loo"})
    if "elpd_loo" not in table.columns:
        raise InputError("the comparison table has no elpd_loo column; pass the output of arviz.compare()")
    return table, dict(influential or {})


def _influential_rows(value: Any) -> pd.DataFrame:
    """Species and (if given) Pareto k, from a list, dict, Series or DataFrame."""
    if value is None:
        return pd.DataFrame(columns=["species"])
    if isinstance(value, pd.DataFrame):
        return value.reset_index(drop=isinstance(value.index, pd.RangeIndex))
    if isinstance(value, pd.Series):
        return pd.DataFrame({"species": [str(i) for i in value.index], "pareto_k": value.to_numpy()})
    if isinstance(value, Mapping):
        return pd.DataFrame({"species": [str(k) for k in value], "pareto_k": list(value.values())})
    if isinstance(value, (str, bytes)):
        return pd.DataFrame({"species": [str(value)]})
    return pd.DataFrame({"species": [str(v) for v in value]})


def _elpd_figure(table: pd.DataFrame):
    names = [str(i) for i in table.index]
    elpd = table["elpd_loo"].to_numpy(dtype=float)
    se = table["se"].to_numpy(dtype=float) if "se" in table else np.zeros_like(elpd)
    best = int(np.nanargmax(elpd))
    diff = elpd - elpd[best]
    dse = table["dse"].to_numpy(dtype=float) if "dse" in table else np.zeros_like(elpd)
    m = len(names)
    fig, ax = new_figure(6.4, 0.55 * m + 1.4)
    yy = np.arange(m)
    ax.errorbar(diff, yy, xerr=2 * np.nan_to_num(dse), fmt=MARKERS[0], color=OKABE_ITO["blue"],
                ecolor=OKABE_ITO["blue"], capsize=3, linestyle="none",
                label="ELPD difference from the best model (± 2 se of the difference)")
    ax.errorbar(elpd - elpd[best], yy + 0.22, xerr=2 * np.nan_to_num(se), fmt=MARKERS[1],
                color=OKABE_ITO["orange"], ecolor=OKABE_ITO["orange"], capsize=2, linestyle="none",
                markerfacecolor="white", label="ELPD of the model (± 2 se), shifted by the best ELPD")
    ax.axvline(0, color="black", linestyle=LINESTYLES[1], linewidth=1)
    ax.set_yticks(yy)
    ax.set_yticklabels(names)
    ax.set_ylim(m - 0.5, -0.7)
    ax.set_xlabel("ELPD (LOO) relative to the best model; higher is better")
    ax.legend(fontsize=7, frameon=False, loc="lower left", bbox_to_anchor=(0, 1.0))
    fig.tight_layout()
    return fig


def write_comparison_report(
    comparison: Any,
    out_dir: str | Path,
    influential: Mapping[str, Any] | None = None,
    title: str = "cladewise model comparison",
    notes: list[str] | None = None,
) -> Path:
    """Write ``out_dir/compare_report.html`` (plus figures/ and tables/).

    Parameters
    ----------
    comparison : DataFrame or object
        An ``arviz.compare`` table (index: model names; columns rank, elpd_loo,
        p_loo, elpd_diff, weight, se, dse, warning, ...), or an object with a
        ``.table`` DataFrame and optionally an ``.influential`` dict.
    out_dir : str or Path
        Folder to write into (created if needed).
    influential : mapping, optional
        Model name -> influential species: a list of names, or a dict / Series of
        species -> Pareto k, or a DataFrame.
    title : str
    notes : list of str, optional
        Extra plain-language lines (e.g. how the models were fitted).

    Returns
    -------
    Path
    """
    table, infl = _unpack(comparison, influential)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    target = out / REPORT_NAME
    if target.exists() and MARKER not in target.read_text(encoding="utf-8", errors="replace")[:400]:
        raise InputError(f"{str(target)!r} exists and was not written by cladewise; move or rename it first")
    prog = Progress(3, "comparison report")
    prog.step("table")
    shown = table.copy()
    shown.insert(0, "model", [str(i) for i in shown.index])
    num = [c for c in shown.columns if c != "model" and pd.api.types.is_numeric_dtype(shown[c])]
    tdir = out / "tables"
    tdir.mkdir(exist_ok=True)
    shown.to_csv(tdir / "comparison.csv", index=False)
    best = str(table["elpd_loo"].astype(float).idxmax())
    parts = [f"<p>Models compared by their expected log predictive density for a left-out species "
             f"(ELPD, from leave-one-species-out PSIS-LOO; Vehtari, Gelman &amp; Gabry 2017). "
             f"Highest ELPD: <b>{esc(best)}</b>.</p>"]
    parts.append('<div id="comparison-table">' + table_html(
        shown, numeric=num, headers={"elpd_loo": "ELPD (LOO)", "p_loo": "p_loo (effective parameters)",
                                     "elpd_diff": "ELPD difference", "se": "se", "dse": "se of difference"})
        + "</div>")
    if "elpd_diff" in table and "dse" in table:
        rows = []
        for name, r in table.iterrows():
            if str(name) == best:
                continue
            d, s = float(r["elpd_diff"]), float(r["dse"])
            ratio = abs(d) / s if s > 0 else np.inf
            verdict = ("clearly worse" if ratio > 2 and abs(d) > 4
                       else "not clearly different (difference within about 2 se, or below 4)")
            rows.append(f"<li>{esc(name)}: ELPD lower by {abs(d):.1f} (se {s:.1f}): {esc(verdict)}.</li>")
        if rows:
            parts.append("<p>Against the best model (a difference under 4, or under about twice its "
                         "standard error, is not a clear difference: common practice, Sivula et al. 2020):</p>"
                         "<ul>" + "".join(rows) + "</ul>")
    if "warning" in table and table["warning"].astype(bool).any():
        parts.append('<div class="banner bad">For at least one model some Pareto k values are high, so its '
                     "LOO estimate is unreliable; see the influential species below.</div>")
    for n in notes or []:
        parts.append(f"<p>{esc(n)}</p>")
    prog.step("figure")
    fig = _elpd_figure(table)
    saved = save_figure(fig, out / "figures", "compare_elpd", "ELPD differences",
                        "Each model's ELPD relative to the best (0, dashed line). Filled circles: "
                        "difference from the best model with ± 2 standard errors of the difference; open "
                        "squares: the model's own ELPD with ± 2 standard errors. Models whose difference "
                        "bar crosses zero are not clearly worse.")
    figs = figure_html(saved)
    prog.step("influential species")
    inf_parts = []
    for model in [str(i) for i in table.index] + [m for m in infl if m not in set(map(str, table.index))]:
        if model not in infl:
            continue
        df = _influential_rows(infl[model])
        if len(df):
            df.to_csv(tdir / f"influential_{_safe_name(model)}.csv", index=False)
            inf_parts.append(f"<h3>{esc(model)}</h3>" + table_html(
                df, numeric=[c for c in df.columns if pd.api.types.is_numeric_dtype(df[c])]))
        else:
            inf_parts.append(f"<h3>{esc(model)}</h3><p>No influential species (all Pareto k ≤ 0.7).</p>")
    if not inf_parts:
        inf_parts.append('<p class="skip">No list of influential species was given.</p>')
    sections = [
        ("elpd", "ELPD table", "".join(parts)),
        ("plot", "ELPD differences", figs),
        ("influential", "Influential species", "<p>Species with Pareto k above 0.7 dominate the LOO "
         "estimate of a model; refit without them to see how much the comparison depends on them.</p>"
         + "".join(inf_parts)),
    ]
    atomic_write(target, page(title, f"{len(table)} models", sections))
    prog.done(f"wrote {target}")
    return target


def _safe_name(name: str) -> str:
    keep = "".join(c if c.isalnum() or c in "-_" else "_" for c in name)
    return keep[:60] or "model"
