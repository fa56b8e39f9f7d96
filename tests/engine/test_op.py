"""The PyTensor Op: value and gradient, PyMC's own sampler, nutpie and data swaps."""

from __future__ import annotations

import ctypes

import numpy as np
import pytest

pm = pytest.importorskip("pymc")
nutpie = pytest.importorskip("nutpie")
import pytensor  # noqa: E402
import pytensor.tensor as pt  # noqa: E402

from cladewise.engine import dense, loglik, loglik_and_grad, tree_loglik  # noqa: E402
from cladewise.engine.testing import random_tree  # noqa: E402
from engine_cases import make_case  # noqa: E402


def _symbolic(case):
    names = ["lengths", "y", "R", "E", "err_var", "mu"]
    syms = [pt.dvector("lengths"), pt.dmatrix("y"), pt.dmatrix("R"), pt.dmatrix("E"),
            pt.dmatrix("err_var"), pt.dvector("mu")]
    lp = tree_loglik(case["parent"], syms[0], syms[1], case["observed"], *syms[2:])
    return names, syms, lp


def test_op_value_and_gradient_python_perform():
    # Value against the scipy dense multivariate normal density of the tree model
    # (Felsenstein 1973, Am. J. Hum. Genet. 25:471-492: Brownian motion gives a Gaussian
    # with shared-path covariance); gradient against the engine's own
    # numpy gradient (itself checked against finite differences of scipy).
    case = make_case(21, 12, 2, root_edge=True, with_E=True, p_missing=0.2)
    case["y"][~case["observed"]] = 0.0
    names, syms, lp = _symbolic(case)
    f = pytensor.function(syms, [lp, *pt.grad(lp, syms)], mode="FAST_COMPILE")
    out = f(*[case[n] for n in names])
    assert float(out[0]) == pytest.approx(dense.loglik(**case), rel=1e-10)
    _, grad = loglik_and_grad(**case)
    for n, g in zip(names, out[1:]):
        np.testing.assert_allclose(g, grad[n], rtol=1e-12, atol=1e-14, err_msg=n)


def test_op_verify_grad():
    # PyTensor's own finite-difference check of the Op's gradient.
    case = make_case(22, 6, 2, root_edge=True, with_E=True, p_missing=0.2)
    par, obs = case["parent"], case["observed"]

    def fn(lengths, y, R, E, err_var, mu):
        # symmetrise so that verify_grad's independent entry perturbations are valid
        return tree_loglik(par, lengths, y, obs, 0.5 * (R + R.T), 0.5 * (E + E.T), err_var, mu)

    rng = np.random.default_rng(0)
    pytensor.gradient.verify_grad(
        fn,
        [case[n] for n in ["lengths", "y", "R", "E", "err_var", "mu"]],
        rng=rng, eps=1e-6, abs_tol=1e-5, rel_tol=1e-5, mode="FAST_COMPILE",
    )


def _model(parent, lengths, y, observed, err_var):
    k = y.shape[1]
    with pm.Model() as model:
        par = pm.Data("parent", parent)
        ln = pm.Data("lengths", lengths)
        yd = pm.Data("y", y)
        od = pm.Data("observed", observed)
        mu = pm.Flat("mu", shape=k)  # flat prior: the model logp is the likelihood
        log_sd = pm.Flat("log_sd", shape=k)
        R = pt.diag(pt.exp(2 * log_sd))
        pm.Potential("loglik", tree_loglik(par, ln, yd, od, R, pt.zeros((k, k)), err_var, mu))
    return model


def _case_for_model(seed, n=20):
    rng = np.random.default_rng(seed)
    parent, lengths = random_tree(n, rng)
    y = rng.normal(size=(n, 2))
    obs = rng.random((n, 2)) > 0.2
    y[~obs] = 0.0
    return parent, lengths, y, obs, np.full((n, 2), 0.05)


def _numpy_logp_grad(parent, lengths, y, obs, ev, mu, log_sd):
    R = np.diag(np.exp(2 * log_sd))
    lp, g = loglik_and_grad(parent, lengths, y, obs, R, np.zeros((2, 2)), ev, mu)
    # chain rule through R = diag(exp(2 log_sd))
    return lp, g["mu"], 2 * np.diag(g["R"]) * np.exp(2 * log_sd)


def test_pymc_compiled_logp_and_dlogp():
    parent, lengths, y, obs, ev = _case_for_model(5)
    model = _model(parent, lengths, y, obs, ev)
    point = {"mu": np.array([0.3, -0.2]), "log_sd": np.array([-0.1, 0.2])}
    lp = model.compile_logp()(point)
    dlp = model.compile_dlogp()(point)
    ref, gmu, gsd = _numpy_logp_grad(parent, lengths, y, obs, ev, point["mu"], point["log_sd"])
    assert lp == pytest.approx(ref, rel=1e-10)
    order = [v.name for v in model.value_vars]
    ref_grad = np.concatenate([gmu if n == "mu" else gsd for n in order])
    np.testing.assert_allclose(dlp, ref_grad, rtol=1e-9)


def test_pymc_sample_runs():
    parent, lengths, y, obs, ev = _case_for_model(6)
    with _model(parent, lengths, y, obs, ev):
        idata = pm.sample(draws=50, tune=50, chains=1, progressbar=False,
                          compute_convergence_checks=False, random_seed=1)
    assert np.isfinite(idata.posterior["mu"].values).all()


def _nutpie_logp(compiled, x):
    x = np.ascontiguousarray(x, dtype=np.float64)
    grad = np.zeros_like(x)
    lp = np.zeros(1)
    dptr = ctypes.POINTER(ctypes.c_double)
    rc = compiled.compiled_logp_func.ctypes(
        x.size, x.ctypes.data_as(dptr), grad.ctypes.data_as(dptr), lp.ctypes.data_as(dptr),
        compiled.user_data.ctypes.data,
    )
    assert rc == 0
    return lp[0], grad


def test_nutpie_compiles_samples_and_swaps_tree_without_recompiling():
    parent, lengths, y, obs, ev = _case_for_model(7)
    model = _model(parent, lengths, y, obs, ev)
    compiled = nutpie.compile_pymc_model(model)
    trace = nutpie.sample(compiled, chains=1, tune=200, draws=200, progress_bar=False, seed=3)
    assert np.isfinite(trace.posterior["mu"].values).all()

    # nutpie's flat parameter vector: names and slices from the compiled model
    names = list(compiled.shape_info[0])
    slices = dict(zip(names, compiled.shape_info[1]))
    mu, log_sd = np.array([0.1, -0.3]), np.array([0.2, -0.1])
    x = np.zeros(compiled.n_dim)
    x[slices["mu"]] = mu
    x[slices["log_sd"]] = log_sd

    lp, g = _nutpie_logp(compiled, x)
    ref, gmu, gsd = _numpy_logp_grad(parent, lengths, y, obs, ev, mu, log_sd)
    assert lp == pytest.approx(ref, rel=1e-10)
    np.testing.assert_allclose(g[slices["mu"]], gmu, rtol=1e-9)
    np.testing.assert_allclose(g[slices["log_sd"]], gsd, rtol=1e-9)

    # another tree with the same species count, swapped in as data
    rng = np.random.default_rng(99)
    parent2, lengths2 = random_tree(y.shape[0], rng)
    assert parent2.size == parent.size  # both bifurcating: same node count
    swapped = compiled.with_data(parent=parent2, lengths=lengths2)
    lp2, g2 = _nutpie_logp(swapped, x)
    ref2, gmu2, gsd2 = _numpy_logp_grad(parent2, lengths2, y, obs, ev, mu, log_sd)
    assert ref2 != pytest.approx(ref, rel=1e-6)
    assert lp2 == pytest.approx(ref2, rel=1e-10)
    np.testing.assert_allclose(g2[slices["mu"]], gmu2, rtol=1e-9)
    # and back: the original compiled model is unchanged
    assert _nutpie_logp(compiled, x)[0] == pytest.approx(ref, rel=1e-12)
    assert loglik(parent2, lengths2, y, obs, np.diag(np.exp(2 * log_sd)), np.zeros((2, 2)),
                  ev, mu) == pytest.approx(ref2, rel=1e-12)


@pytest.mark.parametrize("k", [2, 3])
def test_op_full_error_covariance_value_and_verify_grad(k):
    # Value against the scipy dense density with blockdiag(S_i) added; gradient by
    # PyTensor's own finite differences, every entry of the (N, k, k) error
    # covariance included (symmetrised in the graph, so any perturbation is valid).
    case = make_case(23 + k, 7, k, root_edge=True, with_E=True, p_missing=0.2, err_full=True)
    case["y"][~case["observed"]] = 0.0
    par, obs = case["parent"], case["observed"]
    S = pt.dtensor3("S")
    lp = tree_loglik(par, case["lengths"], case["y"], obs, case["R"], case["E"], S, case["mu"])
    f = pytensor.function([S], [lp, pt.grad(lp, S)], mode="FAST_COMPILE")
    val, g = f(case["err_var"])
    assert float(val) == pytest.approx(dense.loglik(**case), rel=1e-10)
    _, ref = loglik_and_grad(**case)
    np.testing.assert_allclose(g, ref["err_var"], rtol=1e-12, atol=1e-14)

    def fn(lengths, y, R, E, err, mu):
        return tree_loglik(par, lengths, y, obs, 0.5 * (R + R.T), 0.5 * (E + E.T),
                           0.5 * (err + err.dimshuffle(0, 2, 1)), mu)

    pytensor.gradient.verify_grad(
        fn, [case[n] for n in ["lengths", "y", "R", "E", "err_var", "mu"]],
        rng=np.random.default_rng(1), eps=1e-6, abs_tol=1e-5, rel_tol=1e-5, mode="FAST_COMPILE",
    )


def test_numba_mode_full_error_covariance_matches_numpy():
    # The numba_funcify path (used by nutpie) against the numpy entry point.
    case = make_case(29, 10, 2, with_E=True, p_missing=0.2, err_full=True)
    case["y"][~case["observed"]] = 0.0
    S = pt.dtensor3("S")
    lp = tree_loglik(case["parent"], case["lengths"], case["y"], case["observed"], case["R"],
                     case["E"], S, case["mu"])
    f = pytensor.function([S], [lp, pt.grad(lp, S)], mode="NUMBA")
    val, g = f(case["err_var"])
    ref, grad = loglik_and_grad(**case)
    assert float(val) == pytest.approx(ref, rel=1e-12)
    np.testing.assert_allclose(g, grad["err_var"], rtol=1e-12, atol=1e-14)
