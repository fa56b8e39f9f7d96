"""The report of one fit: ``report.html`` plus figures/ and tables/ in the fit folder."""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

import numpy as np
import pandas as pd

from cladewise.errors import InputError
from cladewise.inference.results import atomic_write, is_cladewise_output
from cladewise.model.describe import evolution_description, measurement_error_description
from cladewise.model.quantities import plain_words, quantity as catalogue_entry
from cladewise.report.regime_plot import regime_figure
from cladewise.report import figures as F
from cladewise.report.data import FitView, read_fit_folder
from cladewise.report.html import MARKER, esc, figure_html, fmt, page, table_html
from cladewise.report.progress import Progress
from cladewise.report.style import SavedFigure, save_figure

__all__ = ["write_fit_report", "build_fit_report", "ReportResult"]

REPORT_NAME = "report.html"


@dataclass
class ReportResult:
    """What :func:`build_fit_report` wrote, with the time each part took (seconds)."""

    path: Path
    figures: list[SavedFigure] = field(default_factory=list)
    skipped: dict[str, str] = field(default_factory=dict)
    tables: list[Path] = field(default_factory=list)
    timings: dict[str, float] = field(default_factory=dict)


def write_fit_report(out_dir: str | Path) -> Path:
    """Write ``out_dir/report.html``, ``out_dir/figures/*.png|svg`` and ``out_dir/tables/*.csv``.

    Parameters
    ----------
    out_dir : str or Path
        A fit folder written by ``cladewise fit`` (posterior.nc, summary.json).

    Returns
    -------
    Path
        The HTML file: self-contained (figures embedded), opens offline.

    Raises
    ------
    InputError
        The folder is not a fit folder, or a ``report.html`` not written by cladewise
        is in the way.
    """
    return build_fit_report(out_dir).path


# --------------------------------------------------------------------------- safety
def _guard_outputs(out: Path) -> None:
    """Refuse to replace files that cladewise did not write.

    A fit folder carrying the cladewise marker is cladewise's own; an older fit folder
    (written before the marker existed) is written into only when its report.html,
    if any, carries the page marker of a cladewise report.
    """
    target = out / REPORT_NAME
    if target.exists() and not is_cladewise_output(out):
        try:
            head = target.read_text(encoding="utf-8", errors="replace")[:400]
        except OSError:
            head = ""
        if MARKER not in head:
            raise InputError(
                f"{str(target)!r} exists and was not written by cladewise; move or rename it, "
                "then run the report again"
            )
    for sub in ("figures", "tables"):
        if (out / sub).exists() and not (out / sub).is_dir():
            raise InputError(f"{str(out / sub)!r} is a file, but the report needs a folder of that name; "
                             "move the file away")


# --------------------------------------------------------------------------- words
def _model_html(view: FitView) -> str:
    info = view.info
    model = info.get("model") or {}
    kind = view.kind or "unknown"
    evo_key = str(model.get("evolution") or "bm")
    evo = evolution_description(evo_key)
    me_key = str(model.get("measurement_error") or "none")
    spc = bool(model.get("species_covariance"))
    parts = [f"<p>{esc(info.get('description') or 'No description was saved with this fit.')}</p>"]
    words = []
    if kind == "regression":
        words.append(f"A phylogenetic regression, <b>{esc(model.get('formula') or '')}</b>: the response "
                     "given the predictors has residuals that evolve along the tree, so closely related "
                     "species are allowed to have similar residuals (the PGLS form, Grafen 1989).")
        eq = ["y = X β + e", "e ~ Normal(0, σ² · C(θ)" + (" + E · I" if spc else "") + ")"]
    else:
        words.append("The true species means Y (species × traits) evolve together along the tree. "
                     "R is the evolutionary rate matrix: its diagonal holds the rate of each trait, "
                     "and its correlation is the evolutionary correlation.")
        mu_term = "vec(Y) ~ Normal(1 ⊗ μ, R ⊗ C(θ)" + (" + E ⊗ I" if spc else "") + ")"
        if kind == "independent":
            eq = [mu_term, "R = diag(σ²) (traits evolve independently: no evolutionary correlation)"]
        else:
            eq = [mu_term, "R = diag(σ) · Ω · diag(σ),   Ω ~ LKJ (correlation matrix)"]
        eq.append("μ: trait means at the root")
    if spc:
        words.append("E is a species-level covariance that does not follow the tree; R against E splits "
                     "covariance into a phylogenetic and a species-level part.")
    eq.append(f"C(θ): {evo.covariance}")
    eq.append(f"observation: {measurement_error_description(me_key).observation}")
    words.append(f"Model of evolution: {esc(evo.title)}. Measurement error: {esc(me_key)}. "
                 f"Likelihood: {esc(info.get('likelihood') or 'not recorded')}.")
    parts.append("<p>" + " ".join(words) + "</p>")
    parts.append('<div class="formula">' + "\n".join(esc(e) for e in eq) + "</div>")
    priors = info.get("priors") or []
    if priors:
        df = pd.DataFrame([{k: p.get(k, "") for k in ("parameter", "distribution", "reason")} for p in priors])
        parts.append("<h3>Priors</h3>" + table_html(df))
    else:
        parts.append('<p class="skip">The priors were not saved with this fit.</p>')
    notes = info.get("notes") or []
    if notes:
        parts.append("<h3>Notes from the fit</h3><ul>" + "".join(f"<li>{esc(n)}</li>" for n in notes) + "</ul>")
    return "".join(parts)


def _data_html(view: FitView, tables: dict[str, pd.DataFrame]) -> str:
    info = view.info
    ds = info.get("data_summary") or {}
    n = info.get("n_species") or len(view.species)
    parts = []
    line = f"<p><b>{esc(fmt(n))}</b> species entered the analysis"
    if ds:
        line += (f" (the tree had {esc(fmt(ds.get('n_tree_tips')))} tips, the table "
                 f"{esc(fmt(ds.get('n_table_species')))} species)")
    line += ". Traits: " + esc(", ".join(view.traits) or "not recorded")
    if view.predictors:
        line += "; model terms: " + esc(", ".join(view.predictors))
    parts.append(line + ".</p>")
    if ds.get("tree_source") or ds.get("traits_source"):
        parts.append(f"<p>Tree file: {esc(ds.get('tree_source') or '')}<br>Trait file: "
                     f"{esc(ds.get('traits_source') or '')}</p>")
    if not ds:
        parts.append('<p class="skip">This fit folder holds no data summary (it was made by an older '
                     "version or from Python without a spec), so matching details are not shown.</p>")
    dropped = ds.get("dropped") or []
    if dropped:
        df = pd.DataFrame([{"name": d.get("name"), "where": d.get("where"), "reason": d.get("reason")}
                           for d in dropped])
        tables["dropped_species"] = df
        parts.append(f"<h3>Species left out ({len(dropped)})</h3>" + table_html(df))
    elif ds:
        parts.append("<p>No species was left out: every name matched.</p>")
    if ds.get("renamed"):
        parts.append(f"<p>{esc(fmt(ds.get('renamed')))} names were matched after tidying "
                     "(spaces, underscores or capitals).</p>")
    traits = ds.get("traits") or []
    if traits:
        rows = []
        for t in traits:
            ns = t.get("n_species") or n
            rows.append({
                "trait": t.get("name"),
                "species with a value": f"{fmt(t.get('n_observed'))} of {fmt(ns)}",
                "with standard error": fmt(t.get("n_with_se")),
                "with specimens": fmt(t.get("n_with_specimens")),
                "log scale": "yes" if t.get("logged") else "no",
                "minimum": t.get("minimum"), "maximum": t.get("maximum"),
            })
        df = pd.DataFrame(rows)
        tables["trait_coverage"] = df
        parts.append("<h3>Trait completeness and measurement error</h3>"
                     + table_html(df, numeric=("minimum", "maximum")))
        if ds.get("specimens"):
            parts.append(f"<p>{esc(fmt(ds.get('n_specimens')))} specimen rows were read.</p>")
    elif view.y is not None:
        obs = np.isfinite(view.y).sum(axis=0)
        parts.append("<p>Species with a value: " + esc(", ".join(
            f"{t} {int(o)} of {view.y.shape[0]}" for t, o in zip(view.traits, obs))) + ".</p>")
    tree = ds.get("tree") or {}
    if tree:
        facts = [
            ("tips", fmt(tree.get("n_tips"))),
            ("ultrametric", "yes" if tree.get("ultrametric") else "no"),
            ("polytomies", fmt(tree.get("n_polytomies"))),
            ("zero-length branches", fmt(tree.get("n_zero_length"))),
            ("height (root to farthest tip)", fmt(tree.get("height"), 4)),
            ("root edge", fmt(tree.get("root_edge"))),
            ("trees in the sample", fmt(ds.get("n_trees"))),
        ]
        parts.append("<h3>The tree</h3>" + table_html(pd.DataFrame(facts, columns=["fact", "value"])))
        for w in tree.get("warnings") or []:
            parts.append(f'<div class="banner note">{esc(w)}</div>')
    elif view.tree is not None:
        t = view.tree
        parts.append(f"<p>The fitted tree has {t.n_tips} tips and {t.n_nodes - t.n_tips} internal nodes; "
                     f"it is {'ultrametric' if t.is_ultrametric() else 'not ultrametric'}.</p>")
    for note in view.notes:
        parts.append(f'<p class="skip">{esc(note)}</p>')
    if view.y is not None and len(view.species) == view.y.shape[0]:
        df = pd.DataFrame(view.y, columns=view.traits[: view.y.shape[1]])
        if view.se is not None and view.se.shape == view.y.shape:
            for j, t in enumerate(view.traits[: view.y.shape[1]]):
                df[f"{t} se"] = view.se[:, j]
        if view.design is not None:
            for c in view.design.columns:
                if str(c).lower() != "intercept" and c not in df.columns:
                    df[c] = view.design[c].to_numpy(dtype=float)
        df.insert(0, "species", view.species)
        tables["species_data"] = df
        parts.append(f"<details><summary>The {len(df)} species and their values as analysed "
                     "(click to open; blank: missing)</summary>"
                     + table_html(df, numeric=[c for c in df.columns if c != "species"], digits=4)
                     + "</details>")
    return "".join(parts)


def _diagnostics_html(view: FitView) -> str:
    d = view.info.get("diagnostics") or {}
    if not d:
        return ('<div class="banner note">No diagnostics were saved with this fit; check the rank '
                "plots below.</div>")
    ok = bool(d.get("ok"))
    parts = []
    if ok:
        parts.append('<div class="banner good"><b>The sampling diagnostics found no problem.</b> '
                     "The chains agree and the draws are enough for the intervals reported.</div>")
    else:
        probs = d.get("problems") or ["see the values below"]
        parts.append('<div class="banner bad" role="alert"><b>Warning: the sampling diagnostics failed.</b> '
                     "Do not rely on the results until this is fixed (run longer chains, "
                     "raise target_accept, or simplify the model).<ul>"
                     + "".join(f"<li>{esc(p)}</li>" for p in probs) + "</ul></div>")
    rows = [
        ("largest R-hat", fmt(d.get("max_rhat"), 4), "below 1.01: the chains agree (Vehtari et al. 2021)"),
        ("smallest bulk ESS", fmt(d.get("min_ess_bulk"), 4),
         "at least 400 effective draws for stable means (Vehtari et al. 2021)"),
        ("smallest tail ESS", fmt(d.get("min_ess_tail"), 4), "at least 400 for stable interval ends"),
        ("divergent transitions", fmt(d.get("divergences")),
         "0: the sampler met no region it could not explore"),
        ("smallest BFMI", fmt(d.get("min_bfmi"), 3), "above 0.3: the energy of the sampler moves freely "
         "(common practice)"),
        ("draws kept", fmt(d.get("n_draws")), "all chains together"),
    ]
    parts.append(table_html(pd.DataFrame(rows, columns=["check", "value", "what good looks like"])))
    return "".join(parts)


def _results_html(view: FitView, tables: dict[str, pd.DataFrame]) -> str:
    t = view.table
    if t.empty:
        return '<p class="skip">No summary table was saved with this fit.</p>'
    hdi = int(round(float(view.info.get("hdi_prob") or 0.95) * 100))
    words = []
    for r in t.itertuples(index=False):
        var = getattr(r, "variable", "")
        entry = catalogue_entry(var)
        if entry is None or not entry.headline:
            continue
        if var == "coef" and str(r.quantity).lower().endswith("[intercept]"):
            continue
        lo, hi = r.hdi_low, r.hdi_high
        s = f"{plain_words(r.quantity, var)}: {fmt(r.mean)} ({hdi}% HDI {fmt(lo)} to {fmt(hi)})"
        pp = getattr(r, "prob_positive", None)
        if pp is not None and pp == pp:
            s += f", P(>0) = {float(pp):.2f}"
            if lo is not None and hi is not None and (lo > 0 or hi < 0):
                s += "; the interval excludes zero"
            else:
                s += "; the interval includes zero"
        words.append(f"<li>{esc(s)}</li>")
    out = []
    if words:
        out.append("<p>In words:</p><ul>" + "".join(words[:24]) + "</ul>")
    cols = ["quantity", "variable", "mean", "sd", "hdi_low", "hdi_high", "prob_positive", "r_hat",
            "ess_bulk", "ess_tail"]
    df = t[[c for c in cols if c in t.columns]].copy()
    tables["results"] = df
    shown = df.copy()
    shown.insert(0, "meaning", [plain_words(q, v) for q, v in zip(df["quantity"], df.get("variable", df["quantity"]))])
    shown = shown.drop(columns=[c for c in ("variable",) if c in shown.columns])
    headers = {"quantity": "name", "hdi_low": f"{hdi}% HDI low", "hdi_high": f"{hdi}% HDI high",
               "prob_positive": "P(>0)", "r_hat": "R-hat", "ess_bulk": "ESS bulk", "ess_tail": "ESS tail"}
    out.append('<div id="results-table">' + table_html(
        shown, numeric=("mean", "sd", "hdi_low", "hdi_high", "prob_positive", "r_hat", "ess_bulk", "ess_tail"),
        headers=headers) + "</div>")
    out.append("<p>HDI: highest posterior density interval, the narrowest interval holding "
               f"{hdi}% of the posterior. P(>0): posterior probability that the quantity is positive "
               "(given for correlations, slopes and coefficients).</p>")
    return "".join(out)


_CAUTIONS = [
    ("Correlation is not causation.",
     "An evolutionary correlation says two traits changed together along the tree; it does not say "
     "which one drives the other, or that either does: a third, unmeasured trait or the environment may "
     "drive both."),
    ("The model of evolution is an assumption.",
     "Brownian motion, lambda, Ornstein-Uhlenbeck and the rest describe evolution differently and can "
     "give different answers. Check: fit the alternatives and compare them with leave-one-species-out "
     "cross-validation (LOO, ELPD; cladewise compare), and look at the posterior predictive check."),
    ("The tree is an assumption.",
     "Topology and branch lengths are estimates. Check: refit over a sample of trees from the dating "
     "analysis and see whether the conclusions hold."),
    ("Small samples give wide intervals.",
     "With few species the intervals are wide and the priors matter; read the width of the HDI, not "
     "only whether it excludes zero."),
    ("Measurement error matters.",
     "Species means estimated from few specimens are noisy; ignoring that noise biases slopes towards "
     "zero and can inflate phylogenetic signal. Give standard errors or specimen rows when you have them."),
    ("Influential species.",
     "Species with Pareto k above 0.7 weigh heavily on the fit; refit without them to see how much the "
     "result depends on them."),
]


def _cautions_html(view: FitView) -> str:
    parts = ["<ul>" + "".join(f"<li><b>{esc(a)}</b> {esc(b)}</li>" for a, b in _CAUTIONS) + "</ul>"]
    saved = view.info.get("cautions")
    if saved:
        items = saved if isinstance(saved, list) else [saved]
        parts.append("<p>Saved with the fit:</p><ul>" + "".join(f"<li>{esc(c)}</li>" for c in items) + "</ul>")
    return "".join(parts)


def _reproduce_html(view: FitView, tables: dict[str, pd.DataFrame]) -> str:
    info = view.info
    parts = []
    cmd = info.get("command")
    parts.append("<h3>Command</h3>" + (f"<pre>{esc(cmd)}</pre>" if cmd else
                                       '<p class="skip">Not recorded (the fit was made from Python).</p>'))
    samp = info.get("sampling") or {}
    if samp:
        rows = [(k, "" if v is None else str(v)) for k, v in samp.items()]
        parts.append(f"<h3>Sampler settings (seed {esc(samp.get('seed', 'not recorded'))})</h3>"
                     + table_html(pd.DataFrame(rows, columns=["setting", "value"])))
    timing = {k: v for k, v in (info.get("timing_seconds") or {}).items()
              if isinstance(v, (int, float))}  # tree-sample fits also keep per-tree lists
    if timing:
        parts.append("<p>Time taken: " + esc(", ".join(f"{k.replace('_', ' ')} {float(v):.1f} s"
                                                       for k, v in timing.items())) + ".</p>")
    if info.get("spec_path"):
        parts.append(f"<p>Spec file: {esc(info.get('spec_path'))}</p>")
    if info.get("spec_text"):
        parts.append("<h3>Spec text</h3><pre>" + esc(info.get("spec_text")) + "</pre>")
    env = info.get("environment") or {}
    if info.get("cladewise_version") and "cladewise" not in env:
        env = {"cladewise": info["cladewise_version"], **env}
    if env:
        df = pd.DataFrame(list(env.items()), columns=["package", "version"])
        tables["environment"] = df
        parts.append("<h3>Versions</h3>" + table_html(df))
    parts.append("<p>Files in this folder: posterior.nc (all draws, ArviZ InferenceData), summary.csv, "
                 "summary.json, figures/ (PNG and SVG of every figure), tables/ (CSV of every table).</p>")
    return "".join(parts)


# --------------------------------------------------------------------------- build
_FIGURES: list[tuple[str, str, str, Callable[[FitView], Any]]] = [
    ("tree", "data", "The tree and the species values", F.tree_figure),
    ("regimes", "data", "Evolutionary regimes on the tree", regime_figure),
    ("posterior_densities", "results", "Posterior densities", F.posterior_densities),
    ("species_scatter", "results", "Species data and the evolutionary regression", F.data_scatter),
    ("contrasts", "results", "Independent contrasts", F.contrasts_plot),
    ("predictive_check", "checks", "Posterior predictive check", F.predictive_check),
    ("pareto_k", "checks", "Influential species (Pareto k)", F.pareto_k_plot),
    ("rank_plots", "diagnostics", "Rank plots", F.rank_plots),
]


def build_fit_report(out_dir: str | Path, progress: Progress | None = None) -> ReportResult:
    """Write the report and return what was written and how long each figure took.

    Same output as :func:`write_fit_report`; used by the benchmarks.
    """
    t_start = time.perf_counter()
    out = Path(out_dir)
    view = read_fit_folder(out)
    _guard_outputs(out)
    prog = progress or Progress(len(_FIGURES) + 2, "report")
    res = ReportResult(path=out / REPORT_NAME)
    res.timings["read"] = time.perf_counter() - t_start
    fig_dir = out / "figures"
    by_section: dict[str, list[str]] = {}
    tables: dict[str, pd.DataFrame] = {}
    for name, section, title, fn in _FIGURES:
        prog.step(f"figure {title.lower()}")
        t0 = time.perf_counter()
        try:
            fig, caption = fn(view)
        except F.Skip as why:
            res.skipped[name] = str(why)
            if getattr(why, "quiet", False):  # a figure of an optional model part: no message
                continue
            by_section.setdefault(section, []).append(
                f'<p class="skip">{esc(title)}: not drawn, because {esc(why)}.</p>')
            res.timings[name] = time.perf_counter() - t0
            continue
        loo = getattr(fig, "cladewise_loo", None)
        saved = save_figure(fig, fig_dir, name, title, caption)
        res.figures.append(saved)
        by_section.setdefault(section, []).append(figure_html(saved))
        if loo is not None:
            _, sp, k = loo
            tables["pareto_k"] = pd.DataFrame({"species": sp, "pareto_k": k}).sort_values(
                "pareto_k", ascending=False)
        res.timings[name] = time.perf_counter() - t0

    prog.step("tables and page")
    t0 = time.perf_counter()
    sections = []
    sections.append(("data", "The data", _data_html(view, tables) + "".join(by_section.get("data", []))))
    sections.append(("model", "The model", _model_html(view)))
    sections.append(("diagnostics", "Sampling diagnostics",
                     _diagnostics_html(view) + "".join(by_section.get("diagnostics", []))))
    sections.append(("results", "Results", _results_html(view, tables) + "".join(by_section.get("results", []))))
    from cladewise.report.ancestral_report import ancestral_section

    anc_html, anc_figs = ancestral_section(view, fig_dir, tables)
    res.figures += anc_figs
    sections.append(("ancestral", "Ancestral values and predictions", anc_html))
    checks = "".join(by_section.get("checks", []))
    if "pareto_k" in tables:
        pk = tables["pareto_k"]
        high = pk[pk["pareto_k"] > 0.7]
        checks += ("<h3>Species with Pareto k above 0.7</h3>" + table_html(high, numeric=("pareto_k",))
                   if len(high) else "<p>No species has Pareto k above 0.7.</p>")
    sections.append(("checks", "Model checks", checks))
    sections.append(("cautions", "Cautions", _cautions_html(view)))
    sections.append(("reproduce", "Reproducing this run", _reproduce_html(view, tables)))
    if view.info.get("priors"):
        tables["priors"] = pd.DataFrame(view.info["priors"])
    diag = view.info.get("diagnostics") or {}
    if diag:
        tables["diagnostics"] = pd.DataFrame(
            [(k, "; ".join(v) if isinstance(v, list) else v) for k, v in diag.items()], columns=["check", "value"])
    table_dir = out / "tables"
    table_dir.mkdir(parents=True, exist_ok=True)
    for tname, df in tables.items():
        p = table_dir / f"{tname}.csv"
        df.to_csv(p, index=False)
        res.tables.append(p)
    title = "cladewise fit report"
    folder_name = out.resolve().name
    subtitle = f"Fit folder: {folder_name}. " + (view.info.get("description") or "")
    atomic_write(res.path, page(title, subtitle, sections))
    res.timings["page"] = time.perf_counter() - t0
    res.timings["total"] = time.perf_counter() - t_start
    prog.done(f"wrote {res.path}")
    return res
