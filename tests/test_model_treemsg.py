"""The whitened taxon terms (tree messages): exact marginal likelihood and change of variables."""

import numpy as np
import pandas as pd
import pytest

from allolaw.model.builder import build_model
from allolaw.model.spec import parse_spec
from test_model_builder import _nested_data


def test_only_the_terms_named_in_vary_get_taxon_deviations():
    sim = _nested_data()
    spec = parse_spec({"taxa": {"levels": "innermost", "vary": ["exponent"]}}, name="v")
    names = set(build_model(sim.data, spec, levels=sim.levels, log_reference_size=0.0).named_vars)
    assert "taxon_exponent__family" in names
    assert not any(n.startswith(("taxon_intercept__", "intercept_sd__")) for n in names)
    assert "taxon_exponent__order" not in names


@pytest.mark.parametrize("case", ["two levels, three terms", "one level, intercept only"])
def test_whitened_taxon_values_give_the_exact_marginal_likelihood(case, tree_form):
    # The sampler sees each taxon value through its exact conditional given its parent and
    # the data below it (model.terms.taxon_terms), plus a potential (prior density and
    # log-Jacobian). For a law linear in the taxon values with normal noise, the trait's
    # density plus that potential must equal the marginal density of the data with every
    # taxon value integrated out, for ANY value of the standard normals w. Outside check:
    # the marginal from the dense covariance of the nested normal model, y ~ N(F m, F C Fᵀ +
    # σ² I) (e.g. Gelman et al. 2013, Bayesian Data Analysis 3rd ed., ch. 15), evaluated with
    # scipy.stats.multivariate_normal.
    from scipy import stats

    sim = _nested_data()
    first = sim.data["family"].iloc[0]  # a family with a single species
    drop = sim.data.index[sim.data["family"] == first][1:]
    data = sim.data.drop(index=drop).reset_index(drop=True)
    sigma, ref = 0.3, 0.2
    if case == "two levels, three terms":
        levels = sim.levels
        spec = {"taxa": {"levels": "all", "vary": ["intercept", "exponent"]},
                "curvature": "shared_and_taxa"}
        terms = ["intercept", "exponent", "curvature"]
    else:
        levels = sim.levels
        spec = {"taxa": {"levels": "innermost", "vary": ["intercept"]}}
        terms = ["intercept"]
    spec["priors"] = {"sigma": {"fixed": sigma}, "intercept": {"mean": 0.4, "sd": 2.0}}
    spec = parse_spec(spec, name="w")
    model = build_model(data, spec, levels=levels, log_reference_size=ref)
    used = levels if len(terms) == 3 else levels[-1:]
    logp = model.compile_logp(vars=[model["trait"], *model.potentials], sum=True)

    rng = np.random.default_rng(7)
    x = data["log_size"].to_numpy() - ref
    y = data["log_trait"].to_numpy()
    feature = {"intercept": np.ones_like(x), "exponent": x, "curvature": x**2}
    # the taxon SDs are those of deviations at the data's centre (model/correlated.py): the
    # same law written around the mean log size
    xc = data["log_size"].to_numpy() - data["log_size"].mean()
    centred = {"intercept": np.ones_like(xc), "exponent": xc, "curvature": xc**2}
    prior = {"intercept": (0.4, 2.0), "exponent": (1.0, 1.0), "curvature": (0.0, 0.25)}
    for trial in range(3):
        point = model.initial_point()
        sds = {}
        for term in terms:
            for level in used:
                sds[term, level] = rng.uniform(0.05, 1.5) if trial else 1e-3  # near zero too
                point[f"{term}_sd__{level}_log__"] = np.log(sds[term, level])
        for name in point:
            if name.endswith("_w"):
                point[name] = rng.normal(0.0, 3.0, point[name].shape)
        shared_exponent = None
        if "exponent" not in terms:
            shared_exponent = 0.7
            point["exponent"] = np.array(shared_exponent)
        # dense nested model: each species' term value is the sum of the steps on its path
        mean = np.zeros(len(y))
        cov = sigma**2 * np.eye(len(y))
        for term in terms:
            m0, s0 = prior[term]
            paths = [np.ones((len(y), 1)) * s0 * feature[term][:, None]]
            for level in used:
                onehot = pd.get_dummies(data[level]).to_numpy(dtype=float)
                paths.append(onehot * sds[term, level] * centred[term][:, None])
            loading = np.concatenate(paths, axis=1)
            mean += m0 * feature[term]
            cov += loading @ loading.T
        if shared_exponent is not None:
            mean += shared_exponent * x
        expected = stats.multivariate_normal(mean, cov).logpdf(y)
        assert float(logp(point)) == pytest.approx(expected, abs=1e-7), trial


def test_whitened_size_population_gives_the_exact_marginal_density_of_the_true_sizes(tree_form):
    # With errors in size and taxon levels, the true log sizes follow a nested population
    # (model.terms.size_population): the taxon size means are whitened given the true sizes
    # and the potential `size_tree_density` holds their prior density, the log-Jacobian and
    # the density of the true sizes given their taxon means. For ANY standard normals w it
    # must equal the marginal density of the true sizes with every taxon size mean integrated
    # out. Outside check: the dense covariance of the nested normal model,
    # x ~ N(m 1, s0² 11ᵀ + Σ_l s_l² Z_l Z_lᵀ + s_w² I) (e.g. Gelman et al. 2013, Bayesian Data
    # Analysis 3rd ed., ch. 15), evaluated with scipy.stats.multivariate_normal.
    from scipy import stats

    sim = _nested_data()
    spec = parse_spec({"taxa": {"levels": "all", "vary": ["intercept", "exponent"]},
                       "size_error": "known",
                       "priors": {"size_population": {"mean": 0.3, "sd": 2.0,
                                                      "sd_scale": 1.0}}}, name="s")
    data = sim.data.assign(sd_source_size="given")
    model = build_model(data, spec, levels=sim.levels, log_reference_size=0.0)
    logp = model.compile_logp(vars=[model["size_tree_density"]], sum=True)
    rng = np.random.default_rng(11)
    n = len(data)
    for trial in range(3):
        point = model.initial_point()
        true = rng.normal(0.0, 2.0, n)
        point["size_shift"] = true - data["log_size"].to_numpy()
        point["size_mean_w"] = rng.normal(0.0, 3.0, point["size_mean_w"].shape)
        cov = np.full((n, n), 2.0**2)
        for level in sim.levels:
            sd = rng.uniform(0.05, 1.5) if trial else 1e-3  # near zero too
            point[f"size_sd__{level}_log__"] = np.log(sd)
            onehot = pd.get_dummies(data[level]).to_numpy(dtype=float)
            cov += sd**2 * onehot @ onehot.T
        within = rng.uniform(0.1, 1.0)
        point["size_within_sd_log__"] = np.log(within)
        cov += within**2 * np.eye(n)
        expected = stats.multivariate_normal(np.full(n, 0.3), cov).logpdf(true)
        assert float(logp(point)) == pytest.approx(expected, abs=1e-7), trial


def test_size_population_has_one_mean_per_taxon_and_none_without_levels():
    sim = _nested_data()
    nested = parse_spec({"taxa": {"levels": "all", "vary": ["exponent"]},
                         "size_error": "replicates"}, name="n")
    names = set(build_model(sim.data, nested, levels=sim.levels,
                            log_reference_size=0.0).named_vars)
    assert {"size_mean", "size_within_sd", "true_log_size"} <= names
    assert {f"taxon_size_mean__{lv}" for lv in sim.levels} <= names
    assert "size_sd" not in names
    pooled = parse_spec({"size_error": "replicates", "taxa": {"levels": "none"}}, name="p")
    names = set(build_model(sim.data, pooled, levels=sim.levels,
                            log_reference_size=0.0).named_vars)
    assert {"size_mean", "size_sd", "true_log_size"} <= names
    assert not any(n.startswith(("taxon_size_mean__", "size_within_sd")) for n in names)


def test_whitened_map_is_an_exact_change_of_variables_for_robust_models_too(tree_form):
    # With Student-t residuals the data messages are only an approximation, but the model
    # must stay exact: the potential plus the N(0, 1) density of w must equal the nested
    # normal prior density of the taxon values θ(w) plus log |det ∂θ/∂w| (change of
    # variables). Outside check: the prior density from the dense covariance with
    # scipy.stats.multivariate_normal, the determinant with numpy (θ is linear in w given
    # the rest, so ∂θ/∂w is read off unit vectors).
    from scipy import stats

    sim = _nested_data()
    spec = parse_spec({"taxa": {"levels": "all"}, "residuals": "student_t",
                       "priors": {"intercept": {"mean": 0.4, "sd": 2.0}}}, name="t")
    model = build_model(sim.data, spec, levels=sim.levels, log_reference_size=0.1)
    assert len(model.potentials) == 1
    names = ["intercept", "exponent"]
    nodes = [[t, *(f"taxon_{t}__{lv}" for lv in sim.levels)] for t in names]
    outs = model.replace_rvs_by_values([model[n] for group in nodes for n in group]
                                       + list(model.potentials))
    fn = model.compile_fn(outs, inputs=model.value_vars, point_fn=True,
                          on_unused_input="ignore")
    rng = np.random.default_rng(5)
    point = model.initial_point()
    sds = {(t, lv): rng.uniform(0.1, 1.0) for t in names for lv in sim.levels}
    for (t, lv), v in sds.items():
        point[f"{t}_sd__{lv}_log__"] = np.log(v)
    point["nu_log__"] = np.log(4.0)
    sizes = [point[f"{t}_w"].size for t in names]

    def theta(w):
        for t, part in zip(names, np.split(w, np.cumsum(sizes)[:-1]), strict=True):
            point[f"{t}_w"] = part
        out = fn(point)
        return np.concatenate([np.atleast_1d(v) for v in out[:-1]]), float(out[-1])

    w = rng.normal(size=sum(sizes))
    value, potential = theta(w)
    base, _ = theta(np.zeros_like(w))
    jac = np.array([theta(e)[0] - base for e in np.eye(len(w))]).T
    # dense nested prior of (population, orders, families) per term; the taxon SDs are those
    # of deviations at the data's centre, so a deviation at the reference is A·δ with
    # A = [[1, Δ], [0, 1]], Δ = reference − mean log size (the same law written around
    # another centre; model/correlated.py)
    parent = sim.data.groupby("family", sort=False)["order"].first()
    orders = list(dict.fromkeys(sim.data["order"]))
    shift = 0.1 - float(sim.data["log_size"].mean())
    A = np.array([[1.0, shift], [0.0, 1.0]])
    n_o, n_f = len(orders), len(parent)
    nodes_per_term = 1 + n_o + n_f
    # rows: (term, node); columns: the two population steps, then (term, taxon) steps
    load = np.zeros((2 * nodes_per_term, 2 + 2 * (n_o + n_f)))
    mean = []
    for t, (m0, s0) in enumerate([(0.4, 2.0), (1.0, 1.0)]):
        mean += [m0] * nodes_per_term
        rows = t * nodes_per_term + np.arange(nodes_per_term)
        load[rows, t] = s0
        for u, term in enumerate(names):
            col = 2 + u * (n_o + n_f)
            for i in range(n_o):
                load[rows[1 + i], col + i] = A[t, u] * sds[term, "order"]
            for j, fam in enumerate(parent.index):
                o = orders.index(parent[fam])
                load[rows[1 + n_o + j], col + o] = A[t, u] * sds[term, "order"]
                load[rows[1 + n_o + j], col + n_o + j] = A[t, u] * sds[term, "family"]
    cov = load @ load.T
    expected = (stats.multivariate_normal(mean, cov).logpdf(value)
                + np.linalg.slogdet(jac)[1])
    got = potential + stats.norm.logpdf(w).sum()
    assert got == pytest.approx(expected, abs=1e-7)


def test_taxon_values_are_drawn_down_the_tree_from_their_conditional():
    # The same map with no data messages is the plain non-centred form: value = parent +
    # SD × w, level by level (what prior draws and `parameterisation: non-centred` use).
    sim = _nested_data()
    spec = parse_spec({"taxa": {"levels": "all", "parameterisation": "non-centred"}}, name="n")
    model = build_model(sim.data, spec, levels=sim.levels, log_reference_size=0.0)
    assert not model.potentials
    outs = model.replace_rvs_by_values([model["taxon_intercept__family"],
                                        model["taxon_intercept__order"], model["intercept"]])
    fn = model.compile_fn(outs, inputs=model.value_vars, point_fn=True,
                          on_unused_input="ignore")
    point = model.initial_point()
    rng = np.random.default_rng(2)
    point["intercept_w"] = rng.normal(size=point["intercept_w"].shape)
    point["intercept_sd__order_log__"] = np.log(0.5)
    point["intercept_sd__family_log__"] = np.log(0.2)
    family, order, population = fn(point)
    w = point["intercept_w"]
    prior_mean = float(np.median(sim.data["log_trait"]))
    assert population == pytest.approx(prior_mean + 5.0 * w[0])
    parent = sim.data.groupby("family", sort=False)["order"].first()
    orders = list(dict.fromkeys(sim.data["order"]))
    np.testing.assert_allclose(order, population + 0.5 * w[1:1 + len(orders)])
    expected = [order[orders.index(parent[f])] for f in parent.index]
    np.testing.assert_allclose(family, np.array(expected) + 0.2 * w[1 + len(orders):])
