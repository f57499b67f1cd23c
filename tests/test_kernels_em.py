"""Tests for cliquewise.kernels.em: EM sweep, SQUAREM driver, reference twins.

Outside references used here:
- statsmodels GLM, family Poisson with identity link (the same model fitted by IRLS);
- scipy.optimize.minimize L-BFGS-B with bounds mu >= 0 (the same objective);
- scipy.sparse matrix products (em_step_reference) and scipy.special.gammaln,
  scipy.stats.poisson.logpmf for the likelihood value;
- networkx datasets karate_club_graph (Zachary's weights) and les_miserables_graph,
  with candidates from networkx.find_cliques on the threshold graphs.
"""

from __future__ import annotations

import itertools
import warnings

import networkx as nx
import numpy as np
import pytest
import scipy.special
import scipy.stats
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy.optimize import minimize

from cliquewise.kernels import em

# --------------------------------------------------------------------------
# problem builders (test side, plain Python, obviously correct)
# --------------------------------------------------------------------------


def build_incidence(weights, candidates):
    """Edge->candidate CSR from ``{(u, v): y}`` (u < v) and candidate node lists."""
    edges = sorted(weights)
    eid = {e: i for i, e in enumerate(edges)}
    rows = [[] for _ in edges]
    for k, members in enumerate(candidates):
        for a, b in itertools.combinations(sorted(members), 2):
            rows[eid[(a, b)]].append(k)
    ptr = np.zeros(len(edges) + 1, dtype=np.int64)
    ptr[1:] = np.cumsum([len(r) for r in rows])
    cand = np.array([k for r in rows for k in r], dtype=np.int64)
    y = np.array([weights[e] for e in edges], dtype=np.float64)
    P = np.array([len(c) * (len(c) - 1) / 2 for c in candidates], dtype=np.float64)
    return ptr, cand, y, P


def threshold_clique_problem(G, weight="weight"):
    """Candidates = union over weight levels t of the maximal cliques (size >= 2)
    of the graph of edges with weight >= t, listed by networkx.find_cliques."""
    G = nx.convert_node_labels_to_integers(G, ordering="sorted")
    weights = {(min(u, v), max(u, v)): float(d[weight]) for u, v, d in G.edges(data=True)}
    found = set()
    for t in sorted(set(weights.values())):
        H = nx.Graph([e for e, w in weights.items() if w >= t])
        found.update(frozenset(c) for c in nx.find_cliques(H) if len(c) >= 2)
    candidates = sorted(sorted(c) for c in found)
    return build_incidence(weights, candidates)


KARATE = nx.karate_club_graph()  # networkx ships Zachary's weights (1..7)


def _karate_sub(kind, arg):
    if kind == "club":
        return KARATE.subgraph([n for n, d in KARATE.nodes(data=True) if d["club"] == arg])
    if kind == "ego":
        return nx.ego_graph(KARATE, arg[0], radius=arg[1])
    return nx.k_core(KARATE, arg)


# Sub-problems whose maximum is non-degenerate (strict complementarity), so EM
# converges linearly and the KKT conditions can be met to 1e-6. Chosen by
# exploring the karate subgraphs; the degenerate ones are tested separately.
NONDEGENERATE = {
    "officer_faction": ("club", "Officer"),
    "ego33": ("ego", (33, 1)),
    "ego32": ("ego", (32, 1)),
    "ego2": ("ego", (2, 1)),
    "ego1": ("ego", (1, 1)),
    "ego31": ("ego", (31, 1)),
    "ego8": ("ego", (8, 1)),
    "ego13": ("ego", (13, 1)),
    "ego33_r2": ("ego", (33, 2)),
    "core4": ("core", 4),
}


def gradient(prob, mu):
    """Gradient A^T (y / A mu) - P, computed with scipy (em_step_reference)."""
    ptr, cand, y, P = prob
    return em.em_step_reference(ptr, cand, y, mu, P)[2]


def fit_tight(prob, accelerate=True):
    ptr, cand, y, P = prob
    return em.fit_local(ptr, cand, y, P, tol=1e-15, max_iter=50000, accelerate=accelerate)


def glm_fit(prob):
    """statsmodels GLM Poisson(identity) on the full 0/1 design (rows = edges)."""
    import statsmodels.api as sm

    ptr, cand, y, P = prob
    X = em.incidence_matrix_reference(ptr, cand, len(P)).toarray()
    with warnings.catch_warnings():  # DomainWarning: identity link vs Poisson domain
        warnings.simplefilter("ignore")
        model = sm.GLM(y, X, family=sm.families.Poisson(link=sm.families.links.Identity()))
        return model.fit(start_params=np.full(len(P), y.sum() / P.sum()), tol=1e-13, maxiter=1000)


def random_problem(draw):
    """A random small clique-factor problem (hypothesis)."""
    n = draw(st.integers(3, 9))
    n_cand = draw(st.integers(1, 8))
    candidates = set()
    for _ in range(n_cand):
        size = draw(st.integers(2, min(n, 5)))
        members = draw(st.lists(st.integers(0, n - 1), min_size=size, max_size=size, unique=True))
        candidates.add(tuple(sorted(members)))
    candidates = sorted(candidates)
    pairs = sorted({p for c in candidates for p in itertools.combinations(c, 2)})
    integral = draw(st.booleans())
    if integral:
        ys = draw(st.lists(st.integers(1, 30), min_size=len(pairs), max_size=len(pairs)))
    else:
        ys = draw(st.lists(st.floats(0.01, 50.0), min_size=len(pairs), max_size=len(pairs)))
    return build_incidence(dict(zip(pairs, map(float, ys))), candidates)


problems = st.composite(random_problem)

# --------------------------------------------------------------------------
# the sweep and its reference twin
# --------------------------------------------------------------------------


def sweep_by_partitions(prob, mu, cuts):
    """Sum em_partial over edge partitions, each with a local acc range (cand_lo)."""
    ptr, cand, y, P = prob
    acc = np.zeros(len(P))
    total = 0.0
    bounds = [0, *cuts, len(y)]
    for a, b in zip(bounds[:-1], bounds[1:]):
        sub_ptr = ptr[a : b + 1]
        sub_cand = cand[ptr[a] : ptr[b]]
        lo = int(sub_cand.min()) if sub_cand.size else 0
        hi = int(sub_cand.max()) + 1 if sub_cand.size else 0
        local = np.zeros(hi - lo)
        total += em.em_partial(sub_ptr, sub_cand, y[a:b], mu, local, lo)
        acc[lo:hi] += local
    return acc, total


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(prob=problems(), data=st.data())
def test_partitions_match_single_sweep_and_scipy(prob, data):
    ptr, cand, y, P = prob
    E = len(y)
    mu = np.array(data.draw(st.lists(st.floats(0.05, 20.0), min_size=len(P), max_size=len(P))))
    cuts = sorted(set(data.draw(st.lists(st.integers(0, E), max_size=4))))
    acc_part, ll_part = sweep_by_partitions(prob, mu, cuts)
    acc_one = np.zeros(len(P))
    ll_one = em.em_partial(ptr, cand, y, mu, acc_one)
    # reference: scipy CSR products lam = A mu, g = A^T (y / lam)
    mu_ref, loglik_ref, grad_ref = em.em_step_reference(ptr, cand, y, mu, P)
    np.testing.assert_allclose(acc_part, acc_one, rtol=1e-12, atol=0)
    np.testing.assert_allclose(acc_one, grad_ref + P, rtol=1e-12, atol=0)
    np.testing.assert_allclose(ll_part, ll_one, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(ll_one - em.penalty(mu, P), loglik_ref, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(em.em_update(mu, acc_one, P), mu_ref, rtol=1e-12, atol=0)
    # the fused update and penalty: the same bits as the two kernels apart
    fused_mu, fused_pen = em.em_update_penalty(mu, acc_one, P)
    np.testing.assert_array_equal(fused_mu, em.em_update(mu, acc_one, P))
    assert fused_pen == em.penalty(mu, P)
    np.testing.assert_allclose(em.loglik(ptr, cand, y, mu, P),
                               em.loglik_reference(ptr, cand, y, mu, P), rtol=1e-12, atol=1e-12)


def test_loglik_value_matches_scipy_poisson_logpmf():
    # karate: every pair inside a candidate is an edge, so sum_e lambda_e = sum_k mu_k P_k
    # and the full log-likelihood is sum of scipy.stats.poisson.logpmf(y_e; lambda_e)
    prob = threshold_clique_problem(KARATE)
    ptr, cand, y, P = prob
    mu = np.random.default_rng(3).uniform(0.2, 3.0, len(P))
    lam = em.incidence_matrix_reference(ptr, cand, len(P)) @ mu
    full = em.loglik(ptr, cand, y, mu, P) + em.loglik_constant(y)
    assert full == pytest.approx(scipy.stats.poisson.logpmf(y, lam).sum(), rel=1e-12)
    assert em.loglik_constant(y) == pytest.approx(-scipy.special.gammaln(y + 1).sum(), rel=1e-13)


def test_zero_lambda_gives_minus_inf_and_finite_acc():
    # edge 0 has only candidate 0 (mu = 0) -> lambda = 0 with y > 0 -> -inf (documented)
    ptr = np.array([0, 1, 3], dtype=np.int64)
    cand = np.array([0, 0, 1], dtype=np.int64)
    y = np.array([2.0, 3.0])
    mu = np.array([0.0, 1.5])
    acc = np.zeros(2)
    assert em.em_partial(ptr, cand, y, mu, acc) == -np.inf
    assert np.all(np.isfinite(acc))
    assert acc.tolist() == [2.0, 2.0]  # only edge 1 contributes: y / lambda = 3 / 1.5
    assert em.loglik_partial(ptr, cand, y, mu) == -np.inf
    assert em.em_update(mu, acc, np.array([1.0, 1.0]))[0] == 0.0


def test_zero_weight_edges_are_skipped():
    ptr = np.array([0, 1, 2], dtype=np.int64)
    cand = np.array([0, 0], dtype=np.int64)
    mu = np.array([0.0])
    acc = np.zeros(1)
    # lambda is 0 on both edges, but y = 0 there contributes 0 (0 log 0 = 0)
    assert em.em_partial(ptr, cand, np.array([0.0, 0.0]), mu, acc) == 0.0
    assert acc[0] == 0.0


def test_bad_inputs_raise():
    ptr = np.array([0, 2], dtype=np.int64)
    cand = np.array([0, 3], dtype=np.int64)
    y = np.array([1.0])
    with pytest.raises(ValueError):
        em.em_partial(ptr, cand, y, np.ones(2), np.zeros(2))  # id 3 outside mu
    with pytest.raises(ValueError):
        em.em_partial(ptr, cand, y, np.ones(4), np.zeros(2), 1)  # id 0 below cand_lo
    with pytest.raises(ValueError):
        em.em_partial(ptr, cand, np.ones(2), np.ones(4), np.zeros(4))  # lengths
    with pytest.raises(ValueError):
        em.em_update(np.ones(2), np.ones(3), np.ones(2))


# --------------------------------------------------------------------------
# the fixed point against statsmodels and scipy.optimize
# --------------------------------------------------------------------------


@pytest.mark.parametrize("name", sorted(NONDEGENERATE))
def test_kkt_conditions_at_the_fixed_point(name):
    prob = threshold_clique_problem(_karate_sub(*NONDEGENERATE[name]))
    res = fit_tight(prob)
    assert res.converged
    g = gradient(prob, res.mu)  # scipy, independent of em_partial
    zero = res.mu <= 1e-10 * res.mu.max()
    assert np.all(np.abs(g[~zero]) <= 1e-6), np.abs(g[~zero]).max()
    assert np.all(g[zero] <= 1e-6)


@pytest.mark.parametrize("name", sorted(NONDEGENERATE))
def test_fixed_point_matches_statsmodels_glm_where_interior(name):
    prob = threshold_clique_problem(_karate_sub(*NONDEGENERATE[name]))
    ptr, cand, y, P = prob
    res = fit_tight(prob)
    glm = glm_fit(prob)
    ours_full = res.loglik + em.loglik_constant(y)
    if glm.params.min() > 0:  # interior: the unconstrained and constrained MLE coincide
        np.testing.assert_allclose(res.mu, glm.params, rtol=1e-6, atol=1e-8)
        assert ours_full == pytest.approx(glm.llf, rel=1e-10)
        # Poisson MLE property, checked on the reference solution too
        assert glm.params @ P == pytest.approx(y.sum(), rel=1e-8)
    else:  # the GLM may leave mu >= 0, so it can only do at least as well
        assert glm.llf >= ours_full - 1e-8 * abs(ours_full)


def test_interior_cases_are_really_exercised():
    interior = [n for n in NONDEGENERATE
                if glm_fit(threshold_clique_problem(_karate_sub(*NONDEGENERATE[n]))).params.min() > 0]
    assert len(interior) >= 3, interior


@pytest.mark.parametrize("graph", ["karate", "mr_hi_faction", "les_miserables"])
def test_degenerate_maxima_match_bounded_lbfgsb(graph):
    # These optima have candidates at mu = 0 with zero gradient, where EM converges
    # sublinearly; compare the attained log-likelihood with scipy's L-BFGS-B.
    G = {"karate": KARATE, "mr_hi_faction": _karate_sub("club", "Mr. Hi"),
         "les_miserables": nx.les_miserables_graph()}[graph]
    prob = threshold_clique_problem(G)
    ptr, cand, y, P = prob
    A = em.incidence_matrix_reference(ptr, cand, len(P))

    def negll(mu):
        lam = A @ mu
        if np.any(lam <= 0):
            return np.inf, np.zeros_like(mu)
        return -(y @ np.log(lam) - mu @ P), -(A.T @ (y / lam) - P)

    ref = minimize(negll, np.full(len(P), y.sum() / P.sum()), jac=True, method="L-BFGS-B",
                   bounds=[(0, None)] * len(P),
                   options=dict(ftol=1e-15, gtol=1e-10, maxiter=100000, maxfun=100000))
    res = em.fit_local(ptr, cand, y, P, tol=1e-13, max_iter=50000)
    assert res.loglik >= -ref.fun - 1e-9 * abs(ref.fun)
    g = gradient(prob, res.mu)
    assert np.abs(np.minimum(res.mu, -g)).max() < 1e-3  # KKT natural residual, loosely
    assert res.mu @ P == pytest.approx(y.sum(), rel=1e-8)


def test_total_expected_weight_equals_total_weight():
    # At the maximum d/dc L(c mu) = 0 at c = 1, i.e. sum_k mu_k P_k = sum_e y_e.
    for G in (KARATE, nx.les_miserables_graph()):
        ptr, cand, y, P = threshold_clique_problem(G)
        for acc in (True, False):
            res = em.fit_local(ptr, cand, y, P, tol=1e-10, max_iter=20000, accelerate=acc)
            assert em.penalty(res.mu, P) == pytest.approx(y.sum(), rel=1e-8)


# --------------------------------------------------------------------------
# the driver
# --------------------------------------------------------------------------


@pytest.mark.parametrize("accelerate", [True, False])
def test_trace_is_monotone_on_karate(accelerate):
    ptr, cand, y, P = threshold_clique_problem(KARATE)
    res = em.fit_local(ptr, cand, y, P, tol=0.0, max_iter=3000, accelerate=accelerate)
    assert len(res.trace) == res.iterations + 1
    # allow rounding-level dips only (the loglik itself carries ~1e-15 relative error)
    assert np.all(np.diff(res.trace) >= -1e-12 * abs(res.trace[-1]))
    assert res.trace[-1] > res.trace[0]


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(prob=problems())
def test_trace_is_monotone_and_deterministic_on_random_problems(prob):
    ptr, cand, y, P = prob
    for accelerate in (True, False):
        res = em.fit_local(ptr, cand, y, P, tol=1e-12, max_iter=300, accelerate=accelerate)
        tr = res.trace
        assert np.all(np.diff(tr) >= -1e-12 * np.abs(tr[1:]))
        assert np.all(res.mu >= 0)
        assert em.penalty(res.mu, P) == pytest.approx(y.sum(), rel=1e-9)  # EM image
        again = em.fit_local(ptr, cand, y, P, tol=1e-12, max_iter=300, accelerate=accelerate)
        assert np.array_equal(res.mu, again.mu) and np.array_equal(res.trace, again.trace)
        assert res.iterations == again.iterations and res.n_evals == again.n_evals


def test_squarem_saves_em_evaluations():
    # Varadhan and Roland (2008) report large savings over EM; here we only ask for
    # fewer evaluations to reach at least the value plain EM stops at.
    ptr, cand, y, P = threshold_clique_problem(KARATE)
    plain = em.fit_local(ptr, cand, y, P, tol=1e-11, max_iter=100000, accelerate=False)
    target = plain.loglik
    fast = em.fit_em(*_local_step(ptr, cand, y, P), em.initial_mu(ptr, cand, y, P),
                     tol=0.0, max_iter=100000, callback=lambda it, mu, ll: ll >= target)
    assert fast.loglik >= target
    assert fast.n_evals * 3 < plain.n_evals, (fast.n_evals, plain.n_evals)


def _local_step(ptr, cand, y, P):
    def step(mu):
        acc = np.zeros(len(P))
        part = em.em_partial(ptr, cand, y, mu, acc)
        return em.em_update(mu, acc, P), part - em.penalty(mu, P)

    return step, lambda mu: em.loglik(ptr, cand, y, mu, P)


def test_squarem_s3_solves_a_scalar_linear_map_in_one_cycle():
    # For F(x) = a + c (x - a), 0 < c < 1: r = (c-1)(x0-a), v = (c-1)^2 (x0-a),
    # alpha = -1/(1-c), and x0 - 2 alpha r + alpha^2 v = a exactly (derived by hand).
    a = np.array([1.0, 2.0, 0.5])
    c = 0.9

    def step(x):
        return a + c * (x - a), -float(np.sum((x - a) ** 2))

    res = em.fit_em(step, lambda x: -float(np.sum((x - a) ** 2)), np.array([4.0, 0.1, 3.0]),
                    tol=0.0, max_iter=1)
    # one cycle (3 evaluations) lands on F(a) = a, up to rounding; plain EM would
    # need about 270 steps (0.9**k * 3.9 < 1e-12)
    np.testing.assert_allclose(res.mu, a, rtol=0, atol=1e-12)
    assert res.n_evals == 3 and res.iterations == 1


def test_safeguard_falls_back_to_plain_em_point():
    # A step that reports a terrible value at every extrapolated point (3rd call of a
    # cycle) forces the fallback: the iterates are then exactly F(F(x)).
    a = np.array([1.0, 2.0])
    calls = []

    def F(x):
        return a + 0.5 * (x - a)

    def step(x):
        calls.append(1)
        value = -1e300 if len(calls) % 3 == 0 else -float(np.sum((x - a) ** 2))
        return F(x), value

    x0 = np.array([3.0, -1.0])
    res = em.fit_em(step, lambda x: -float(np.sum((x - a) ** 2)), np.abs(x0), tol=0.0, max_iter=4)
    x = np.abs(x0)
    for _ in range(4):
        x = F(F(x))
    np.testing.assert_array_equal(res.mu, x)
    assert np.all(np.diff(res.trace) >= 0)


def test_driver_edge_cases():
    ptr, cand, y, P = threshold_clique_problem(_karate_sub("ego", (31, 1)))
    mu0 = em.initial_mu(ptr, cand, y, P)
    res = em.fit_local(ptr, cand, y, P, mu0=mu0, max_iter=0)
    assert np.array_equal(res.mu, mu0) and res.iterations == 0 and not res.converged
    assert res.trace.tolist() == [em.loglik(ptr, cand, y, mu0, P)]
    seen = []
    res = em.fit_local(ptr, cand, y, P, tol=0.0, max_iter=100,
                       callback=lambda it, mu, ll: seen.append(ll) or it == 2)
    assert len(seen) == 3 and not res.converged and res.iterations == 3
    assert len(res.trace) == 4
    with pytest.raises(ValueError):
        em.fit_local(ptr, cand, y, P, mu0=-mu0)


def test_initial_mu_is_one_em_step_from_a_constant():
    ptr, cand, y, P = threshold_clique_problem(KARATE)
    mu0 = em.initial_mu(ptr, cand, y, P)
    ref = em.em_step_reference(ptr, cand, y, np.full(len(P), 0.37), P)[0]  # scipy twin
    np.testing.assert_allclose(mu0, ref, rtol=1e-12)
    assert np.all(mu0 > 0)
    assert em.penalty(mu0, P) == pytest.approx(y.sum(), rel=1e-12)


@pytest.mark.parametrize("accelerate", [True, False])
def test_resume_from_a_checkpoint_repeats_the_run(accelerate):
    ptr, cand, y, P = threshold_clique_problem(KARATE)
    step, ll_fn = _local_step(ptr, cand, y, P)
    mu0 = em.initial_mu(ptr, cand, y, P)
    seen = {}

    def keep(it, mu, ll):
        seen[it] = (mu.copy(), ll)

    full = em.fit_em(step, ll_fn, mu0, tol=1e-12, max_iter=400, accelerate=accelerate, callback=keep)
    t = 37
    trace0 = [seen[i][1] for i in range(t)]  # what the callback saw before x_t
    np.testing.assert_array_equal(trace0, full.trace[:t])
    resumed = em.fit_em(step, ll_fn, seen[t][0], tol=1e-12, max_iter=400, accelerate=accelerate,
                        trace0=trace0, start_iter=t)
    assert np.array_equal(resumed.mu, full.mu)
    assert np.array_equal(resumed.trace, full.trace)
    assert resumed.iterations == full.iterations and resumed.converged == full.converged


def test_int32_incidence_gives_the_same_bits():
    # numba specialises on dtype; an int32 incidence must not change any result
    ptr, cand, y, P = threshold_clique_problem(nx.les_miserables_graph())
    mu = em.initial_mu(ptr, cand, y, P)
    a64, a32 = np.zeros(len(P)), np.zeros(len(P))
    l64 = em.em_partial(ptr, cand, y, mu, a64)
    l32 = em.em_partial(ptr.astype(np.int32), cand.astype(np.int32), y, mu, a32)
    assert l64 == l32 and np.array_equal(a64, a32)
    # and both agree with the scipy twin
    np.testing.assert_allclose(a64 - P, em.em_step_reference(ptr, cand, y, mu, P)[2], rtol=1e-12, atol=1e-12)


@settings(max_examples=100, deadline=None)
@given(st.lists(st.tuples(st.floats(0, 10), st.floats(0, 10), st.floats(0, 10)), min_size=1, max_size=30),
       st.floats(-20.0, -1.0), st.floats(0.0, 1e-3))
def test_squarem_vector_kernels_equal_numpy_array_arithmetic(rows, alpha, min_ratio):
    # reference: the same formulas on numpy arrays (temporaries, vectorised)
    from cliquewise.kernels.em import squarem_norms, squarem_point

    x, x1, x2 = (np.array(c, dtype=np.float64) for c in zip(*rows))
    r = x1 - x
    v = x2 - 2.0 * x1 + x
    sr, sv = squarem_norms(x, x1, x2)
    assert sr == pytest.approx(float(r @ r), rel=1e-12, abs=1e-300)
    assert sv == pytest.approx(float(v @ v), rel=1e-12, abs=1e-300)
    want = x - (2.0 * alpha) * r + (alpha * alpha) * v
    bad = ~(want > 0.0)
    want[bad] = min_ratio * x[bad]
    np.testing.assert_array_equal(squarem_point(x, x1, x2, alpha, min_ratio), want)
