"""Rich display of results in a notebook (Jupyter calls ``_repr_html_``)."""

from __future__ import annotations

from typing import Any

from cladewise.report.html import esc, table_html

__all__ = ["fit_html", "SUMMARY_COLUMNS"]

#: the columns of the summary table shown in a terminal and in a notebook
SUMMARY_COLUMNS = ["quantity", "mean", "sd", "hdi_low", "hdi_high", "prob_positive", "r_hat", "ess_bulk"]
_HEADERS = {"hdi_low": "95% HDI low", "hdi_high": "95% HDI high", "prob_positive": "P(>0)",
            "r_hat": "R-hat", "ess_bulk": "bulk ESS"}


def fit_html(result: Any) -> str:
    """A fit as a small HTML block: model, summary table, diagnostics, cautions."""
    info = result.info
    parts = ["<div>"]
    if info.get("partial"):
        parts.append("<p><b>PARTIAL FIT: sampling was interrupted; refit before reporting anything.</b></p>")
    parts.append(f"<p><b>Model:</b> {esc(info.get('description', ''))}<br>"
                 f"<b>Species:</b> {esc(info.get('n_species'))} &nbsp; "
                 f"<b>Traits:</b> {esc(', '.join(info.get('traits', []) or []))}</p>")
    view = result.summary[[c for c in SUMMARY_COLUMNS if c in result.summary.columns]]
    parts.append(table_html(view, numeric=[c for c in view.columns if c != "quantity"], headers=_HEADERS))
    diag = result.diagnostics
    if diag is not None:
        verdict = "no problems found" if diag.ok else "problems: " + "; ".join(diag.problems)
        parts.append(f"<p><b>Diagnostics:</b> R-hat max {diag.max_rhat:.3f}, bulk ESS min "
                     f"{diag.min_ess_bulk:.0f}, divergences {diag.divergences}; {esc(verdict)}</p>")
    notes = info.get("notes") or []
    if notes:
        parts.append("<p><b>Notes:</b></p><ul>" + "".join(f"<li>{esc(n)}</li>" for n in notes) + "</ul>")
    from cladewise.inference.fit import CAUTIONS

    parts.append(f"<p><small>{esc(CAUTIONS)}</small></p></div>")
    return "".join(parts)
