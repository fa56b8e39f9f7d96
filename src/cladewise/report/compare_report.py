"""The report of a LOO model comparison: ``compare_report.html``."""

from __future__ import annotations

from pathlib import Path
from typing import Any, Mapping

import numpy as np
import pandas as pd

from cladewise.errors import InputError
from cladewise.evaluation.loo import DIFF_SE_FACTOR, K_THRESHOLD
from cladewise.inference.results import atomic_write
from cladewise.report.html import MARKER, esc, figure_html, page, table_html
from cladewise.report.progress import Progress
from cladewise.report.style import LINESTYLES, MARKERS, OKABE_ITO, new_figure, save_figure

__all__ = ["write_comparison_report", "comparison_figure"]

REPORT_NAME = "compare_report.html"

_HEADERS = {"elpd": "ELPD (LOO)", "p_loo": "p_loo (effective parameters)", "elpd_diff": "ELPD difference",
            "se": "se", "diff_se": "se of difference", "n_high_k": "species with Pareto k > 0.7",
            "weight": "stacking weight"}


#: arviz.compare names -> the names of :class:`cladewise.evaluation.compare.ComparisonResult`
_ARVIZ_NAMES = {"elpd_loo": "elpd", "dse": "diff_se"}


def _unpack(comparison: Any, influential: Mapping[str, Any] | None,
            notes: list[str] | None) -> tuple[pd.DataFrame, dict[str, Any], list[str]]:
    """The comparison table in the columns of ``ComparisonResult.table`` (index: model names)."""
    table = comparison
    if not isinstance(comparison, pd.DataFrame):
        table = getattr(comparison, "table", None)
        if influential is None:
            influential = getattr(comparison, "influential", None)
        if notes is None:
            notes = list(getattr(comparison, "notes", []) or [])
    if not isinstance(table, pd.DataFrame):
        raise InputError("the comparison must be a cladewise ComparisonResult (cladewise.evaluation.compare."
                         "compare_fits), its .table, or a pandas DataFrame like arviz.compare() returns")
    table = table.rename(columns={k: v for k, v in _ARVIZ_NAMES.items() if v not in table.columns})
    if "model" in table.columns:
        table = table.set_index("model")
    if "elpd" not in table.columns:
        raise InputError("the comparison table has no elpd column; pass the result of "
                         "cladewise.evaluation.compare.compare_fits (or of arviz.compare())")
    if "n_high_k" not in table.columns and "warning" in table.columns:
        # arviz.compare flags a model with any high Pareto k, without the count
        table = table.assign(n_high_k=table["warning"].astype(bool).astype(int))
    return table, dict(influential or {}), list(notes or [])


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


def comparison_figure(table: pd.DataFrame):
    """ELPD of each model relative to the best, with ± 2 se of the difference and of the ELPD.

    ``table`` has the columns of ``ComparisonResult.table`` with the model names as index.
    """
    names = [str(i) for i in table.index]
    elpd = table["elpd"].to_numpy(dtype=float)
    se = table["se"].to_numpy(dtype=float) if "se" in table else np.zeros_like(elpd)
    best = int(np.nanargmax(elpd))
    diff = elpd - elpd[best]
    dse = table["diff_se"].to_numpy(dtype=float) if "diff_se" in table else np.zeros_like(elpd)
    m = len(names)
    fig, ax = new_figure(6.4, 0.55 * m + 1.4)
    yy = np.arange(m)
    ax.errorbar(diff, yy, xerr=2 * np.nan_to_num(dse), fmt=MARKERS[0], color=OKABE_ITO["blue"],
                ecolor=OKABE_ITO["blue"], capsize=3, linestyle="none",
                label="ELPD difference from the best model (± 2 se of the difference)")
    ax.errorbar(diff, yy + 0.22, xerr=2 * np.nan_to_num(se), fmt=MARKERS[1],
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


def _verdicts(table: pd.DataFrame, best: str) -> list[str]:
    """One line per model against the best: the comparison's own verdict when it has one."""
    rows = []
    for name, r in table.iterrows():
        if str(name) == best:
            continue
        if "verdict" in table.columns and isinstance(r["verdict"], str) and r["verdict"]:
            text = r["verdict"]
        elif "elpd_diff" in table.columns and "diff_se" in table.columns:
            d, s = abs(float(r["elpd_diff"])), float(r["diff_se"])
            text = (f"ELPD lower by {d:.1f} (se {s:.1f}): "
                    + ("clearly worse" if s > 0 and d > DIFF_SE_FACTOR * s
                       else f"not clearly different (within {DIFF_SE_FACTOR:g} se of the difference)"))
        else:
            continue
        rows.append(f"<li>{esc(name)}: {esc(text)}.</li>")
    return rows


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
    comparison : ComparisonResult, DataFrame or object
        The result of :func:`cladewise.evaluation.compare.compare_fits` (its ``table``,
        ``influential`` and ``notes`` are used), its table (columns model or index,
        elpd, se, elpd_diff, diff_se, p_loo, weight, n_high_k, verdict), or an
        ``arviz.compare`` table (elpd_loo, dse and warning are read as elpd, diff_se
        and a flag of high Pareto k).
    out_dir : str or Path
        Folder to write into (created if needed).
    influential : mapping, optional
        Model name -> influential species: a list of names, or a dict / Series of
        species -> Pareto k, or a DataFrame.
    title : str
    notes : list of str, optional
        Extra plain-language lines (default: the comparison's own notes).

    Returns
    -------
    Path
    """
    table, infl, notes = _unpack(comparison, influential, notes)
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
    best = str(table["elpd"].astype(float).idxmax())
    parts = [f"<p>Models compared by their expected log predictive density for a left-out species "
             f"(ELPD, from leave-one-species-out PSIS-LOO; Vehtari, Gelman &amp; Gabry 2017). "
             f"Highest ELPD: <b>{esc(best)}</b>.</p>"]
    parts.append('<div id="comparison-table">' + table_html(
        shown.drop(columns=[c for c in ("verdict",) if c in shown.columns]), numeric=num,
        headers=_HEADERS) + "</div>")
    verdicts = _verdicts(table, best)
    if verdicts:
        parts.append(f'<div id="verdicts"><p>Against the best model (a difference within about '
                     f"{DIFF_SE_FACTOR:g} standard errors of the difference is not a clear difference; "
                     "Sivula et al. 2020):</p><ul>" + "".join(verdicts) + "</ul></div>")
    if "n_high_k" in table and (table["n_high_k"].fillna(0).astype(float) > 0).any():
        flagged = [f"{esc(m)} ({int(k)})" for m, k in table["n_high_k"].items() if k and float(k) > 0]
        parts.append('<div class="banner bad" id="high-pareto-k">For at least one model some Pareto k '
                     f"values are above {K_THRESHOLD:g}, so its LOO estimate is unreliable: "
                     + ", ".join(flagged) + " (species with high k in brackets); see the influential "
                     "species below.</div>")
    for n in notes:
        parts.append(f"<p>{esc(n)}</p>")
    prog.step("figure")
    fig = comparison_figure(table)
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
