"""Models in words: the one place the fit summary and the report take them from.

Evolution models are described beside their parameters in
:data:`cladewise.model.evolution.DESCRIPTIONS`; measurement-error modes here, in
:data:`MEASUREMENT_ERROR_DESCRIPTIONS`.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from cladewise.model.evolution import DESCRIPTIONS, EvolutionDescription

__all__ = [
    "MeasurementErrorDescription",
    "MEASUREMENT_ERROR_DESCRIPTIONS",
    "evolution_description",
    "measurement_error_description",
    "describe_model",
]


@dataclass(frozen=True)
class MeasurementErrorDescription:
    """``summary``: a few words for the fit description; ``observation``: the observation model."""

    summary: str
    observation: str


#: measurement-error mode -> description (one entry per mode of ``ModelSpec.measurement_error``)
MEASUREMENT_ERROR_DESCRIPTIONS: dict[str, MeasurementErrorDescription] = {
    "none": MeasurementErrorDescription(
        "no measurement error", "y_ij = Y_ij (the species means are taken as exact)"),
    "se": MeasurementErrorDescription(
        "known standard errors",
        "y_ij ~ Normal(Y_ij, s_ij²), with s_ij the standard error of the mean given in the data"),
    "specimens": MeasurementErrorDescription(
        "within-species variance estimated from specimens",
        "x_ijm ~ Normal(Y_ij, v_ij) for specimen m of species i: the within-species variances v_ij "
        "are estimated from the specimens, pooled partially across species; equivalently "
        "ȳ_ij ~ Normal(Y_ij, v_ij / n_ij)"),
}


def evolution_description(model: str) -> EvolutionDescription:
    """Description of an evolution model; an unknown name describes itself."""
    return DESCRIPTIONS.get(str(model)) or EvolutionDescription(str(model), "", "see the spec")


def measurement_error_description(mode: str) -> MeasurementErrorDescription:
    """Description of a measurement-error mode; an unknown mode describes itself."""
    return MEASUREMENT_ERROR_DESCRIPTIONS.get(str(mode)) or MeasurementErrorDescription(str(mode), str(mode))


def describe_model(spec: Any, full_within: bool = False) -> str:
    """One line on what a model spec fits (the ``description`` of a fit).

    ``spec`` needs ``kind``, ``traits``, ``formula``, ``evolution``,
    ``measurement_error`` and ``species_covariance`` (a ``ModelSpec``);
    ``full_within`` says the model estimates a within-species covariance between
    traits (specimen rows, two or more traits). The error assumption is always stated.
    """
    from cladewise.model.within_species import describe as describe_error

    evo = evolution_description(spec.evolution).name
    me = describe_error(spec.measurement_error, getattr(spec, "error_correlation", None), full_within)
    disc = getattr(spec, "discrete", None) or {}
    if spec.kind == "regression":
        response = str(spec.formula).split("~", 1)[0].strip().strip("`").strip()
        if response in disc:
            head = (f"phylogenetic {'ordered ' if len(disc[response]) > 2 else ''}probit regression "
                    f"{spec.formula} (threshold model) with {evo} residual liability")
        else:
            head = f"phylogenetic regression {spec.formula} with {evo} residuals"
        preds = [t for t in disc if t != response]
        if preds:
            one = len(preds) == 1
            head += (f"; {', '.join(preds)} {'enters' if one else 'enter'} as indicator columns against "
                     f"{'its' if one else 'their'} first state")
        disc = {}
    elif spec.kind == "correlated":
        head = f"correlated multivariate evolution of {', '.join(spec.traits)} under {evo}"
    else:
        head = f"independent evolution of {', '.join(spec.traits)} under {evo} (no evolutionary correlation)"
    if spec.species_covariance:
        head += ", plus species-level covariance"
    if disc:
        head += f"; {', '.join(disc)} discrete (threshold model: liabilities with tip variance 1)"
    return f"{head}; {me}"
