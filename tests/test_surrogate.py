"""Tests of routeplan.surrogate against published formulas and torch's own losses."""

import itertools

import numpy as np
import pytest
import torch
import torch.nn.functional as F

from routeplan.costs import cost_vectors, error_cost_matrix, expected_cost_vectors
from routeplan.surrogate import (
    asymmetric_softmax,
    asymmetric_softmax_surrogate,
    one_vs_all_surrogate,
    option_probabilities,
    ova_expected_costs,
    softmax_cost_surrogate,
)


def _zero_one_costs(y, answers, n_classes, fees=None):
    answers = np.asarray(answers).reshape(len(y), -1)
    fees = np.zeros(answers.shape[1]) if fees is None else fees
    c = cost_vectors(y, answers, cost_matrix=error_cost_matrix(n_classes), fees=fees)
    return torch.tensor(c)


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_softmax_without_experts_is_cross_entropy(seed):
    # Reference: torch.nn.functional.cross_entropy; M = 0 and 0/1 costs (DESIGN.md).
    rng = np.random.default_rng(seed)
    y = rng.integers(0, 5, size=40)
    logits = torch.tensor(rng.normal(scale=3.0, size=(40, 5)))
    costs = _zero_one_costs(y, np.zeros((40, 0), dtype=int), 5)
    got = softmax_cost_surrogate(logits, costs)
    reference = F.cross_entropy(logits, torch.tensor(y))
    np.testing.assert_allclose(got.item(), reference.item(), rtol=1e-12)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_softmax_one_expert_is_mozannar_sontag_lce(seed):
    # Mozannar & Sontag (ICML 2020), L_CE = -log p_y - 1[m = y] log p_defer.
    rng = np.random.default_rng(seed)
    y = rng.integers(0, 4, size=50)
    m = np.where(rng.uniform(size=50) < 0.6, y, rng.integers(0, 4, size=50))
    logits = torch.tensor(rng.normal(scale=2.0, size=(50, 5)))
    log_p = F.log_softmax(logits, dim=1)
    expected = -log_p[torch.arange(50), torch.tensor(y)] - torch.tensor(m == y) * log_p[:, 4]
    got = softmax_cost_surrogate(logits, _zero_one_costs(y, m, 4), reduction="none")
    torch.testing.assert_close(got, expected)


def test_softmax_alpha_and_weights():
    # With one expert and 0/1 costs, alpha scales the deferral term:
    # -log p_y - alpha 1[m = y] log p_defer (our documented variant of Mozannar & Sontag's alpha).
    rng = np.random.default_rng(5)
    y = rng.integers(0, 3, size=30)
    m = np.where(rng.uniform(size=30) < 0.5, y, (y + 1) % 3)
    logits = torch.tensor(rng.normal(size=(30, 4)))
    costs = _zero_one_costs(y, m, 3)
    log_p = F.log_softmax(logits, dim=1)
    expected = -log_p[torch.arange(30), torch.tensor(y)] - 0.3 * torch.tensor(m == y) * log_p[:, 3]
    got = softmax_cost_surrogate(logits, costs, alpha=0.3, n_classes=3, reduction="none")
    torch.testing.assert_close(got, expected)
    w = torch.tensor(rng.uniform(0.5, 4.0, size=30))
    weighted = softmax_cost_surrogate(logits, costs, weights=w, reduction="sum")
    unweighted = softmax_cost_surrogate(logits, costs, reduction="none")
    torch.testing.assert_close(weighted, (w * unweighted).sum())
    with pytest.raises(ValueError):
        softmax_cost_surrogate(logits, costs, alpha=0.3)  # alpha needs n_classes


def test_surrogates_refuse_missing_costs():
    costs = torch.tensor([[0.0, 1.0, float("nan")]])
    with pytest.raises(ValueError, match="impute"):
        softmax_cost_surrogate(torch.zeros(1, 3), costs)
    with pytest.raises(ValueError, match="impute"):
        one_vs_all_surrogate(torch.zeros(1, 3), costs, n_classes=2)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_ova_one_expert_is_verma_nalisnick(seed):
    # Verma & Nalisnick (ICML 2022), one-vs-all L2D loss, written with
    # torch.nn.functional.binary_cross_entropy_with_logits as reference:
    # -log s(g_y) - sum_{k != y} log(1 - s(g_k)) - 1[m=y] log s(g_d) - 1[m!=y] log(1 - s(g_d)).
    rng = np.random.default_rng(seed)
    K, n = 4, 60
    y = rng.integers(0, K, size=n)
    m = np.where(rng.uniform(size=n) < 0.5, y, rng.integers(0, K, size=n))
    logits = torch.tensor(rng.normal(scale=2.0, size=(n, K + 1)))
    onehot = F.one_hot(torch.tensor(y), K).double()
    expected = F.binary_cross_entropy_with_logits(logits[:, :K], onehot, reduction="none").sum(1)
    expected = expected + F.binary_cross_entropy_with_logits(
        logits[:, K], torch.tensor(m == y).double(), reduction="none"
    )
    got = one_vs_all_surrogate(logits, _zero_one_costs(y, m, K), n_classes=K, reduction="none")
    torch.testing.assert_close(got, expected)


def test_surrogates_are_linear_in_costs():
    # Both losses are linear in the cost vector, so inverse-probability or doubly robust
    # cost corrections keep the expected loss unbiased (common practice: linearity of
    # expectation); checked as loss(mean of costs) == mean of losses for fixed scores.
    rng = np.random.default_rng(9)
    logits = torch.tensor(rng.normal(size=(1, 5))).expand(30, -1)
    costs = torch.tensor(rng.uniform(-1.0, 4.0, size=(30, 5)))
    costs[:, 0] = 5.0  # a common maximum, so that max(c) is the same in every row
    mean_costs = costs.mean(0, keepdim=True)
    soft = softmax_cost_surrogate(logits, costs)
    torch.testing.assert_close(soft, softmax_cost_surrogate(logits[:1], mean_costs))
    ova = one_vs_all_surrogate(logits, costs, n_classes=3, cost_scale=5.0)
    torch.testing.assert_close(ova, one_vs_all_surrogate(logits[:1], mean_costs, n_classes=3,
                                                         cost_scale=5.0))
    with pytest.raises(ValueError):
        one_vs_all_surrogate(logits, costs, n_classes=3, cost_scale=0.0)


@pytest.mark.parametrize("seed", [0, 1])
def test_asymmetric_one_expert_is_cao_et_al(seed):
    # Cao, Mozannar, Feng, Wei & An (NeurIPS 2023): psi_defer = e^{g_d} / (sum_r e^{g_r} -
    # max_{k<=K} e^{g_k}), loss -log psi_y - 1[m=y] log psi_d - 1[m!=y] log(1 - psi_d),
    # written here directly with exponentials (formula recalled from the paper).
    rng = np.random.default_rng(seed)
    K, n = 3, 40
    y = rng.integers(0, K, size=n)
    correct = (rng.uniform(size=n) < 0.5).astype(float)
    logits = torch.tensor(rng.normal(size=(n, K + 1)))
    e = torch.exp(logits)
    psi_y = e[torch.arange(n), torch.tensor(y)] / e[:, :K].sum(1)
    psi_d = e[:, K] / (e.sum(1) - e[:, :K].max(1).values)
    c = torch.tensor(correct)
    expected = -torch.log(psi_y) - c * torch.log(psi_d) - (1 - c) * torch.log(1 - psi_d)
    got = asymmetric_softmax_surrogate(logits, torch.tensor(y), c[:, None], reduction="none")
    torch.testing.assert_close(got, expected)
    probs = asymmetric_softmax(logits, K)
    torch.testing.assert_close(probs[:, K], psi_d)
    assert ((probs[:, K] > 0) & (probs[:, K] < 1)).all()  # a valid probability (the paper's point)


# --- Consistency: minimise the expected surrogate over free scores -----------------------


def _random_outcomes(seed, K=3, M=2):
    """A random distribution over (y, answers), a non-uniform cost matrix and fees.

    Mostly a product of P(y) and per-expert confusion matrices with random competence,
    mixed with an arbitrary joint distribution, so that experts win on some draws.
    """
    rng = np.random.default_rng(seed)
    C = rng.uniform(0.5, 2.0, size=(K, K)) * (1 - np.eye(K))
    fees = rng.uniform(0.0, 0.3, size=M)
    p_y = rng.dirichlet(np.ones(K))
    skill = rng.uniform(0.0, 8.0, size=(M, 1, 1))
    confusion = rng.dirichlet(np.ones(K), size=(M, K)) + skill * np.eye(K)
    confusion /= confusion.sum(axis=2, keepdims=True)
    outcomes = [(y, a) for y in range(K) for a in itertools.product(range(K), repeat=M)]
    product = np.array(
        [p_y[y] * np.prod([confusion[j, y, a[j]] for j in range(M)]) for y, a in outcomes]
    )
    prob = 0.8 * product + 0.2 * rng.dirichlet(np.full(len(outcomes), 0.3))
    ys = np.array([o[0] for o in outcomes])
    answers = np.array([o[1] for o in outcomes])
    return C, fees, ys, answers, prob


def _random_problem(seed):
    """Outcome costs, their probabilities and the expected cost of each option."""
    C, fees, ys, answers, prob = _random_outcomes(seed)
    costs = cost_vectors(ys, answers, cost_matrix=C, fees=fees)
    return torch.tensor(costs), torch.tensor(prob), prob @ costs


def _minimise(loss_of_logits, n_options, steps=60):
    """Minimise a function of one free score vector by LBFGS (float64)."""
    g = torch.zeros(1, n_options, dtype=torch.float64, requires_grad=True)
    opt = torch.optim.LBFGS([g], lr=1, max_iter=steps, line_search_fn="strong_wolfe",
                            tolerance_grad=1e-12, tolerance_change=1e-14)

    def closure():
        opt.zero_grad()
        loss = loss_of_logits(g)
        loss.backward()
        return loss

    for _ in range(5):
        opt.step(closure)
    return g.detach()[0]


def _clear_winner(expected):
    """True when the best option beats the second by more than 1e-3 (no near-tie)."""
    top = np.sort(expected)
    return top[1] - top[0] > 1e-3


@pytest.mark.parametrize("seed", range(8))
def test_softmax_surrogate_is_consistent(seed):
    # Consistency (Mozannar & Sontag, ICML 2020, Theorem 1; Verma et al., AISTATS 2023):
    # the minimiser of the expected surrogate picks the option of least expected cost,
    # found here by brute force over the outcomes.
    costs, prob, expected = _random_problem(seed)
    if not _clear_winner(expected):
        pytest.skip("near-tie between the two best options")
    g = _minimise(
        lambda g: (
            prob * softmax_cost_surrogate(g.expand(len(prob), -1), costs, reduction="none")
        ).sum(),
        costs.shape[1],
    )
    assert int(torch.argmax(g)) == int(np.argmin(expected))
    # The pointwise minimiser is softmax(g)_r proportional to E[max c] - E[c_r] (same source).
    gaps = (prob @ costs.max(1).values).item() - expected
    np.testing.assert_allclose(torch.softmax(g, 0).numpy(), gaps / gaps.sum(), atol=1e-5)


@pytest.mark.parametrize("seed", range(8))
def test_ova_surrogate_is_consistent(seed):
    # Same brute-force check for the one-vs-all form (Verma & Nalisnick, ICML 2022,
    # consistency of the OvA surrogate; cost generalisation documented in the module).
    costs, prob, expected = _random_problem(seed)
    if not _clear_winner(expected):
        pytest.skip("near-tie between the two best options")
    scale = float(costs.max())

    def loss(g):
        per = one_vs_all_surrogate(g.expand(len(prob), -1), costs, n_classes=3,
                                   reduction="none", cost_scale=scale)
        return (prob * per).sum()

    g = _minimise(loss, costs.shape[1])
    assert int(torch.argmax(g)) == int(np.argmin(expected))
    np.testing.assert_allclose(ova_expected_costs(g, scale).numpy(), expected, atol=1e-5)


@pytest.mark.parametrize("seed", range(8))
def test_asymmetric_surrogate_estimates_probabilities(seed):
    # Cao et al. (NeurIPS 2023): the minimiser gives psi = P(y|x) and psi_d = P(m = y|x);
    # with 0/1 costs and fees, plugging them into the expected costs picks the least
    # expected cost option (brute force over outcomes).
    K = 3
    _, fees, ys, answers, prob = _random_outcomes(seed)
    correct = (answers == ys[:, None]).astype(float)
    C = error_cost_matrix(K)
    expected = prob @ cost_vectors(ys, answers, cost_matrix=C, fees=fees)
    p = torch.tensor(prob)
    yt, ct = torch.tensor(ys), torch.tensor(correct)
    g = _minimise(
        lambda g: (
            p * asymmetric_softmax_surrogate(g.expand(len(p), -1), yt, ct, reduction="none")
        ).sum(),
        K + len(fees),
    )
    psi = option_probabilities(g[None], K, "asymmetric")[0].numpy()
    p_y = np.bincount(ys, weights=prob, minlength=K)
    np.testing.assert_allclose(psi[:K], p_y, atol=1e-5)
    np.testing.assert_allclose(psi[K:], prob @ correct, atol=1e-5)
    if _clear_winner(expected):
        plug_in = expected_cost_vectors(psi[None, :K], psi[None, K:], cost_matrix=C, fees=fees)[0]
        assert int(np.argmin(plug_in)) == int(np.argmin(expected))


def test_gradients_finite_for_extreme_logits():
    # Numerical stability of log-softmax / logistic forms (common practice).
    rng = np.random.default_rng(7)
    y = rng.integers(0, 3, size=8)
    m = rng.integers(0, 3, size=(8, 2))
    costs = _zero_one_costs(y, m, 3, fees=np.array([0.1, 0.2]))
    base = torch.tensor(rng.choice([-1e4, 1e4, 0.0], size=(8, 5)), dtype=torch.float32)
    for fn in (
        lambda g: softmax_cost_surrogate(g, costs),
        lambda g: one_vs_all_surrogate(g, costs, n_classes=3),
        lambda g: asymmetric_softmax_surrogate(g, torch.tensor(y), torch.tensor(m == y[:, None])),
    ):
        g = base.clone().requires_grad_(True)
        loss = fn(g)
        loss.backward()
        assert torch.isfinite(loss) and torch.isfinite(g.grad).all()


def test_option_probabilities_kinds():
    g = torch.tensor([[1.0, -1.0, 0.5, 2.0]])
    torch.testing.assert_close(option_probabilities(g, 2, "softmax"), torch.softmax(g, 1))
    torch.testing.assert_close(option_probabilities(g, 2, "ova"), torch.sigmoid(g))
    assert torch.allclose(option_probabilities(g, 2, "asymmetric")[:, :2].sum(1), torch.ones(1))
    with pytest.raises(ValueError):
        option_probabilities(g, 2, "other")
