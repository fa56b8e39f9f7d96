"""Per-draw engine quantities: the model's engine inputs and leave-one-species-out
conditional log densities, evaluated at every posterior draw.

The posterior stores only the free parameters; branch lengths, rate matrices and
error variances of each draw are recomputed here from the compiled model graph.
:class:`EngineDraws` compiles that graph once and serves every draw (and, in a tree
sample, every tree: the compiled function reads the model's tree data at call time).
"""

from __future__ import annotations

from typing import Any

import arviz as az
import numpy as np
import xarray as xr

from cladewise.errors import InputError

__all__ = ["EngineDraws", "engine_draws", "pointwise_loglik", "LOGLIK_VAR"]

LOGLIK_VAR = "y"  # log-likelihood variable (dims chain, draw, species), named like observed_data["y"]


class EngineDraws:
    """A model's engine-input function, compiled once, evaluated draw by draw."""

    def __init__(self, built: Any) -> None:
        self.fn = built.engine_function()
        self.names = [rv.name for rv in built.model.free_RVs]

    def draws(self, idata: az.InferenceData, select: np.ndarray | None = None
              ) -> tuple[dict[str, np.ndarray], tuple[int, int]]:
        """Engine inputs (lengths, y, R, E, err_var, mu, log_scale) stacked over draws, and (chains, draws).

        ``select`` (flat indices into chain x draw) evaluates only those draws; the
        arrays are then stacked over ``select`` in its order.
        """
        post = idata.posterior
        missing = [n for n in self.names if n not in post]
        if missing:
            raise InputError(f"the posterior lacks {missing}: these draws do not belong to this model")
        nc, nd = int(post.sizes["chain"]), int(post.sizes["draw"])
        arrays = {n: post[n].values.reshape((nc * nd,) + post[n].shape[2:]) for n in self.names}
        which = range(nc * nd) if select is None else select
        outs = [self.fn({n: arrays[n][s] for n in self.names}) for s in which]
        return {k: np.stack([o[k] for o in outs]) for k in outs[0]}, (nc, nd)

    def chunks(self, idata: az.InferenceData, size: int):
        """Yield ``(start, inputs)`` for consecutive blocks of at most ``size`` draws.

        Per-draw inputs (branch lengths, error variances) are as large as the tree;
        a block at a time keeps memory at ``size`` draws, not all of them.
        """
        nc, nd = int(idata.posterior.sizes["chain"]), int(idata.posterior.sizes["draw"])
        for start in range(0, nc * nd, size):
            d, _ = self.draws(idata, np.arange(start, min(start + size, nc * nd)))
            yield start, d


def engine_draws(built: Any, idata: az.InferenceData, engine: EngineDraws | None = None
                 ) -> tuple[dict[str, np.ndarray], tuple[int, int]]:
    """Per-draw engine inputs (lengths, y, R, E, err_var, mu, log_scale) stacked over draws."""
    return (engine or EngineDraws(built)).draws(idata)


def pointwise_loglik(built: Any, idata: az.InferenceData, engine: EngineDraws | None = None) -> xr.DataArray:
    """Leave-one-species-out conditional log density per chain, draw and species.

    ``log p(y_i | y_-i, theta)`` with measurement error included: for joint models
    all of the species' observed traits, for a regression the response given the
    predictors (Bürkner, Gabry & Vehtari 2021). Linear in the number of species.
    Under OU on a non-ultrametric tree the conditional is that of the rescaled values
    less ``log D_i`` per observed cell (exact; see ``ou_rescaled_inputs`` in
    :mod:`cladewise.model.evolution`). ``built.data.tree`` gives the tree topology; ``engine`` a compiled
    :class:`EngineDraws` to reuse.
    """
    from cladewise.engine import loo_logdensity_draws

    engine = engine or EngineDraws(built)
    post = idata.posterior
    nc, nd = int(post.sizes["chain"]), int(post.sizes["draw"])
    parent = built.data.tree.parent
    # regime models: R is (draws, regimes, k, k) and each branch has a regime
    painting = getattr(built, "painting", None)
    regime = None if painting is None else painting.node_regime
    cuts = None
    if getattr(built, "discrete", None) is not None:  # threshold model: states' interval probabilities
        from cladewise.evaluation.discrete import draw_cuts, pointwise_loglik_discrete

        cuts = draw_cuts(built, idata)
    n_obs = built.observed.sum(axis=1)[None, :]
    ll = np.empty((nc * nd, len(built.species)))
    # blocks of draws: per-draw inputs are tree-sized, all draws at once would not fit for big trees
    size = max(1, min(500, 2_000_000 // max(1, parent.shape[0])))
    for start, d in engine.chunks(idata, size):
        stop = start + d["R"].shape[0]
        if cuts is not None:
            ll[start:stop] = pointwise_loglik_discrete(built, d, cuts[start:stop])
            continue
        y = d["y"]
        if y.ndim == 3 and np.allclose(y, y[:1]):
            y = y[0]
        if y.ndim == 3:
            # regression residuals y - X beta differ per draw: one call per draw
            block = np.stack([
                loo_logdensity_draws(parent, d["lengths"][s:s + 1], y[s], built.observed, d["R"][s:s + 1],
                                     d["E"][s:s + 1], d["err_var"][s:s + 1], d["mu"][s:s + 1],
                                     regime=regime)[0]
                for s in range(y.shape[0])
            ])
        else:
            block = loo_logdensity_draws(parent, d["lengths"], y, built.observed, d["R"], d["E"],
                                         d["err_var"], d["mu"], regime=regime)
        # OU on a non-ultrametric tree: the engine saw y' = mu + (y - mu) / D, and
        # log p(y_i | y_-i) = log p'(y'_i | y'_-i) - (observed cells of i) log D_i
        ll[start:stop] = block - n_obs * d["log_scale"]
    return xr.DataArray(
        ll.reshape(nc, nd, -1), dims=("chain", "draw", "species"),
        coords={"chain": np.arange(nc), "draw": np.arange(nd), "species": list(built.species)},
        name=LOGLIK_VAR,
    )
