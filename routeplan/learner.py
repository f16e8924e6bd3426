"""Routers: learn, per case, whether the model decides or which expert the case goes to.

Every router has the same scikit-learn-style interface (``fit``, ``predict_costs``,
``predict_route``, ``predict_proba``, ``predict_expert_correct``, ``get_arrays``):

- :class:`PluginRouter` -- a classifier by cross-entropy plus a model of
  ``P(expert j right | x)`` per expert, deferring to the option of least expected cost
  after fees (post-hoc deferral: Narasimhan, Jitkrittum, Menon, Rawat & Kumar, "Post-hoc
  estimators for learning to defer to an expert", NeurIPS 2022). Given an imported
  class-probability matrix it learns the routing only (two-stage learning to defer:
  Mao, Mohri & Zhong, "Two-Stage Learning to Defer with Multiple Experts", NeurIPS 2023).
- :class:`SurrogateRouter` -- one scorer with ``K + M`` outputs trained end to end by
  the cost-sensitive softmax surrogate (Mozannar & Sontag, ICML 2020; Verma, Barrejon &
  Nalisnick, AISTATS 2023), the one-vs-all surrogate (Verma & Nalisnick, ICML 2022) or
  the asymmetric softmax surrogate (Cao, Mozannar, Feng, Wei & An, NeurIPS 2023).

Options are numbered ``0 .. K-1`` (the model decides that class) and ``K + j`` (defer to
expert ``j``). Unknown expert answers (``-1``) are handled without masking: a
correctness model is fitted first on the known answers (weighted by the inverse of
their selection probability) and the unknown option costs are filled with their
expected value given the truth (:func:`routeplan.costs.expected_cost_vectors`).

Training (shared by all routers): mini-batch Adam in float32 on a training split, with
early stopping and calibration on a validation split. The score that stops training is
the validation *system cost* -- the mean realised cost of the option each case is
routed to, with the imputed expected cost where the routed expert's answer is unknown --
or the validation loss (``early_stopping``; the plug-in's classifier uses its log-loss
by default, see :class:`PluginRouter`). Randomness comes only from ``random_state``
(weights initialised inside ``torch.random.fork_rng``; batches shuffled by a
``torch.Generator``); ``fit`` uses at most two CPU threads and restores the previous
setting afterwards. The networks and the loop live in :mod:`routeplan._nets`.

:func:`routeplan.selection.fit_candidates` fits several routers (:data:`CANDIDATES`) and
:func:`routeplan.selection.select_router` compares them on held-out cases by system cost
with intervals, beside the model alone and each expert alone; both are re-exported here.

Models are stored as plain arrays plus a JSON-able description (:meth:`get_arrays`,
:func:`router_from_arrays`); nothing is pickled.
"""

from __future__ import annotations

import warnings
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F
from numpy.typing import ArrayLike
from scipy.special import expit, logsumexp
from sklearn.base import BaseEstimator
from sklearn.model_selection import train_test_split
from sklearn.utils.validation import check_array, check_is_fitted
from torch import nn

from routeplan import calibration as cal
from routeplan import costs as costs_mod
from routeplan import surrogate as sur
from routeplan._nets import (
    _CHUNK,
    _fit_threads,
    _forward,
    _load_net,
    _LoopSettings,
    _make_net,
    _net_arrays,
    _torch_session,
    _train_loop,
)

__all__ = [
    "CANDIDATES",
    "DEFAULT_CANDIDATES",
    "PluginRouter",
    "SelectionResult",
    "SurrogateRouter",
    "fit_candidates",
    "realised_costs",
    "router_from_arrays",
    "select_router",
]

#: Version of the layout written by ``get_arrays``.
ARRAYS_FORMAT = 1
_EPS = 1e-12

CALIBRATION_PRIOR = 5.0
"""Precision of the prior that keeps each expert's Platt / stacking map near the identity
(the network's own output; :func:`routeplan.calibration.fit_platt`), in cases: with a few
dozen validation answers the map stays near it, with hundreds the data decide. Measured on
the plug-in router's stacking: on the synthetic scenario (two-stage, pool of 3,000, answers
bought at random with equal spend per expert; mean gap to the full-information cost over 6
scenario seeds x 2 draws) at 40 / 80 / 160 fee units, no prior 0.050 / 0.030 / 0.0086,
prior 5 0.046 / 0.023 / 0.0082, prior 20 0.044 / 0.021 / 0.0082; on digits with the
simulated expert of Mozannar & Sontag (k = 2 / 5 / 8, mean of 4 seeds) no prior 0.0265 /
0.0233 / 0.0181, prior 5 0.0269 / 0.0234 / 0.0182, prior 20 0.0286 / 0.0232 / 0.0187 (there
the class route is informative and a strong prior holds it back). Unshrunk, a few dozen
answers fitted a Platt slope of 2.7 and a class-route weight of 4.6, making a weak expert
look strong.
"""

# --------------------------------------------------------------------------------------
# small numeric helpers
# --------------------------------------------------------------------------------------


def _by_chunks(fn: Callable[[np.ndarray, Any], np.ndarray], X: np.ndarray,
               extra: Any = None) -> np.ndarray:
    """fn(X_chunk, extra_chunk) over row chunks, into one array (bounds peak memory)."""
    n = X.shape[0]
    if extra is not None:
        extra = np.asarray(extra)
        if extra.shape[0] != n:
            raise ValueError(f"class_proba has {extra.shape[0]} rows, X has {n}")
    out = None
    for s in range(0, max(n, 1), _CHUNK):
        part = fn(X[s:s + _CHUNK], None if extra is None else extra[s:s + _CHUNK])
        if n <= _CHUNK:
            return part
        if out is None:
            out = np.empty((n, *part.shape[1:]), dtype=part.dtype)
        out[s:s + part.shape[0]] = part
    return out


def _onehot(y: np.ndarray, n_classes: int) -> np.ndarray:
    """One-hot float64 matrix of labels."""
    out = np.zeros((y.shape[0], n_classes))
    out[np.arange(y.shape[0]), y] = 1.0
    return out


def _logit(p: np.ndarray) -> np.ndarray:
    """Log-odds, clipped away from 0 and 1."""
    p = np.clip(p, 1e-6, 1 - 1e-6)
    return np.log(p) - np.log1p(-p)


def _defer_offsets(G: np.ndarray, c: np.ndarray, K: int, n_passes: int = 2) -> np.ndarray:
    """Per-expert offsets on the deferral scores minimising the routed cost c (grid search).

    Coordinate descent over a grid in [-3, 3]; among equal costs the smallest offset wins.
    """
    M = G.shape[1] - K
    b = np.zeros(M)
    grid = np.linspace(-3.0, 3.0, 61)
    grid = grid[np.argsort(np.abs(grid), kind="stable")]  # ties -> the smallest |offset|
    rows = np.arange(G.shape[0])
    for _ in range(n_passes):
        for j in range(M):
            costs = []
            for v in grid:
                H = G.copy()
                H[:, K:] += b
                H[:, K + j] += v - b[j]
                costs.append(c[rows, H.argmax(axis=1)].mean())
            b[j] = grid[int(np.argmin(costs))]
    return b


#: Training cases from which the default MLP gets a third hidden layer (see ``hidden``).
_DEEP_FROM = 5_000


def _resolve_hidden(hidden: Any, n_train: int) -> tuple[int, ...]:
    """Layer widths: as given, else 3 x 64 from _DEEP_FROM training cases, else 2 x 64."""
    if hidden is not None:
        return tuple(int(h) for h in hidden)
    return (64, 64, 64) if n_train >= _DEEP_FROM else (64, 64)


def _lse_without_max(Z: np.ndarray) -> np.ndarray:
    """log(sum_k exp(z_k) - max_k exp(z_k)) per row, by dropping the arg-max column."""
    masked = Z.copy()
    masked[np.arange(Z.shape[0]), Z.argmax(axis=1)] = -np.inf
    return logsumexp(masked, axis=1)


def _as_generator(random_state: Any) -> np.random.Generator:
    """A numpy Generator from None, an int, a Generator or a RandomState."""
    if isinstance(random_state, np.random.RandomState):
        return np.random.default_rng(random_state.randint(0, 2**31 - 1))
    return np.random.default_rng(random_state)


def realised_costs(costs: ArrayLike, routes: ArrayLike, imputed: ArrayLike | None = None
                   ) -> np.ndarray:
    """Cost each case incurs under a routing, per case.

    Parameters
    ----------
    costs : array-like of shape (n, K + M)
        Realised option costs, NaN where an expert's answer is unknown.
    routes : array-like of int, shape (n,)
        Chosen option of each case.
    imputed : array-like of shape (n, K + M), optional
        Estimates used where the routed option's cost is NaN (e.g. expected costs given
        the truth and a correctness model). Without it, NaN stays NaN.

    Returns
    -------
    ndarray of shape (n,)
    """
    c = np.asarray(costs, dtype=np.float64)
    if imputed is not None:
        c = costs_mod.impute_missing_costs(c, imputed)
    r = np.asarray(routes, dtype=np.int64)
    if r.shape != (c.shape[0],) or (r.size and (r.min() < 0 or r.max() >= c.shape[1])):
        raise ValueError("routes must be (n,) option indices in 0..K+M-1")
    return c[np.arange(c.shape[0]), r]

# --------------------------------------------------------------------------------------
# validated data
# --------------------------------------------------------------------------------------


@dataclass
class _Part:
    """One split of validated training data (X already float32, not standardised)."""

    X: np.ndarray
    y: np.ndarray
    answers: np.ndarray
    weights: np.ndarray  # (n, M): inverse selection probability, 0 where unknown
    costs: np.ndarray  # (n, K + M), NaN where unknown
    class_proba: np.ndarray | None = None

    @property
    def known(self) -> np.ndarray:
        """Mask of known answers, (n, M)."""
        return self.answers != costs_mod.MISSING_ANSWER

    def take(self, idx: np.ndarray) -> _Part:
        """Rows idx of every array."""
        cp = None if self.class_proba is None else self.class_proba[idx]
        return _Part(self.X[idx], self.y[idx], self.answers[idx], self.weights[idx],
                     self.costs[idx], cp)


def _check_answers_weights(answers: ArrayLike, sample_weight: ArrayLike | None, n: int
                           ) -> tuple[np.ndarray, np.ndarray]:
    """Validate answers (n, M) and inverse-probability weights; NaN weight -> 1."""
    A = np.asarray(answers)
    if A.ndim == 1 and n > 0 and A.shape[0] == n:
        A = A[:, None]
    if A.ndim != 2 or A.shape[0] != n:
        raise ValueError(f"answers must have shape (n, M) with n = {n}, got {A.shape}")
    if A.size and not np.issubdtype(A.dtype, np.integer):
        if not np.all(np.mod(A, 1) == 0):
            raise ValueError("answers must hold integer class indices (-1 = not asked)")
    A = A.astype(np.int64)
    known = A != costs_mod.MISSING_ANSWER
    if sample_weight is None:
        W = np.ones(A.shape)
    else:
        W = np.array(sample_weight, dtype=np.float64)
        if W.shape != A.shape:
            raise ValueError(f"sample_weight must have the shape of answers {A.shape}, "
                             f"got {W.shape}")
        W = np.where(np.isnan(W), 1.0, W)
        if np.any(~np.isfinite(W[known])) or np.any(W[known] <= 0):
            raise ValueError("sample_weight must be > 0 (inverse selection probabilities)")
    return A, np.where(known, W, 0.0)


def _check_y(y: ArrayLike, n_classes: int | None, name: str) -> np.ndarray:
    """Validate 1-d integer labels in 0..K-1 (any K >= 1 when n_classes is None)."""
    arr = np.asarray(y)
    if arr.ndim != 1 or arr.size == 0:
        raise ValueError(f"{name} must be a non-empty 1-d array of class indices")
    if not np.issubdtype(arr.dtype, np.integer):
        if not np.all(np.isfinite(arr)) or not np.all(np.mod(arr, 1) == 0):
            raise ValueError(f"{name} must hold integer class indices")
    arr = arr.astype(np.int64)
    top = np.iinfo(np.int64).max if n_classes is None else n_classes - 1
    if arr.min() < 0 or arr.max() > top:
        raise ValueError(f"{name} must lie in 0..{top}")
    return arr


def _check_class_proba(P: ArrayLike | None, n: int, n_classes: int) -> np.ndarray | None:
    """Validate an imported (n, K) class-probability matrix."""
    if P is None:
        return None
    P = check_array(P, dtype=np.float64)
    if P.shape != (n, n_classes):
        raise ValueError(f"class_proba must have shape {(n, n_classes)}, got {P.shape}")
    if np.any(P < 0) or not np.allclose(P.sum(axis=1), 1.0, atol=1e-4):
        raise ValueError("class_proba rows must be non-negative and sum to 1")
    return P / P.sum(axis=1, keepdims=True)


def _stratify(y: np.ndarray, n_test: int) -> np.ndarray | None:
    """Labels to stratify on, or None when some class is too rare for it."""
    counts = np.bincount(y)
    counts = counts[counts > 0]
    if counts.min() >= 2 and n_test >= counts.size and len(y) - n_test >= counts.size:
        return y
    return None


def _split_indices(y: np.ndarray, fraction: float, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Seeded, stratified where possible, train/held-out indices."""
    n_test = max(1, int(round(fraction * len(y))))
    idx = np.arange(len(y))
    tr, te = train_test_split(idx, test_size=n_test, random_state=seed,
                              stratify=_stratify(y, n_test))
    return np.sort(tr), np.sort(te)


# --------------------------------------------------------------------------------------
# the shared base
# --------------------------------------------------------------------------------------


class _BaseRouter(BaseEstimator):
    """Shared fitting, calibration, prediction and storage of the routers."""

    _net_names: tuple[str, ...] = ()

    # ---- parameter checks ------------------------------------------------------------

    def _check_params(self) -> None:
        """Validate hyperparameters (at the start of fit)."""
        if self.head not in ("mlp", "linear"):
            raise ValueError(f"head must be 'mlp' or 'linear', got {self.head!r}")
        if self.correctness_head not in (None, "mlp", "linear"):
            raise ValueError(f"correctness_head must be None, 'mlp' or 'linear', "
                             f"got {self.correctness_head!r}")
        if self.hidden is not None and not all(int(h) == h and h >= 1 for h in self.hidden):
            raise ValueError(f"hidden must be positive layer widths, got {self.hidden!r}")
        for name in ("max_epochs", "batch_size", "patience"):
            v = getattr(self, name)
            if int(v) != v or v < 1:
                raise ValueError(f"{name} must be a positive integer, got {v!r}")
        if not self.learning_rate > 0 or not self.weight_decay >= 0:
            raise ValueError("learning_rate must be > 0 and weight_decay >= 0")
        if self.early_stopping not in ("cost", "loss", None):
            raise ValueError(f"early_stopping must be 'cost', 'loss' or None, "
                             f"got {self.early_stopping!r}")
        if not 0 < self.validation_fraction < 1:
            raise ValueError(f"validation_fraction must be in (0, 1), "
                             f"got {self.validation_fraction!r}")

    def _settings(self) -> _LoopSettings:
        """Loop settings from the hyperparameters."""
        return _LoopSettings(int(self.max_epochs), int(self.batch_size), float(self.learning_rate),
                             float(self.weight_decay), int(self.patience), bool(self.verbose),
                             self.console)

    # ---- fit -------------------------------------------------------------------------

    def _fit(self, X, y, answers, *, fees, cost_matrix, sample_weight, X_val, y_val,
             answers_val, sample_weight_val, class_proba=None, class_proba_val=None):
        """Validate, split, seed, then run the subclass's _fit_parts."""
        self._check_params()
        X = check_array(X, dtype=np.float32)
        y = np.asarray(y)
        if y.shape != (X.shape[0],):
            raise ValueError(f"y must have shape ({X.shape[0]},), got {y.shape}")
        A, W = _check_answers_weights(answers, sample_weight, X.shape[0])
        fees_arr = np.asarray(fees, dtype=np.float64).reshape(-1)
        if fees_arr.shape != (A.shape[1],):
            raise ValueError(f"fees must have one entry per expert ({A.shape[1]}), "
                             f"got {fees_arr.shape}")
        K = self._resolve_n_classes(y, A, cost_matrix)
        C = costs_mod.error_cost_matrix(K, matrix=cost_matrix)
        y = _check_y(y, K, "y")
        self.n_features_in_ = X.shape[1]
        self.n_classes_ = K
        self.n_experts_ = A.shape[1]
        self.fees_ = fees_arr
        self.cost_matrix_ = C
        whole = _Part(X, y, A, W, costs_mod.cost_vectors(y, A, cost_matrix=C, fees=fees_arr),
                      _check_class_proba(class_proba, X.shape[0], K))
        rng = _as_generator(self.random_state)
        split_seed = int(rng.integers(0, 2**31 - 1))
        if X_val is None:
            if len(y) < 10:
                raise ValueError("fit needs at least 10 cases (or an explicit validation split)")
            tr, va = _split_indices(y, self.validation_fraction, split_seed)
            train, val = whole.take(tr), whole.take(va)
        else:
            train, val = whole, self._check_val(X_val, y_val, answers_val, sample_weight_val,
                                                class_proba_val)
        if (train.class_proba is None) != (val.class_proba is None):
            raise ValueError("give class_proba for both the training and validation cases")
        self.two_stage_ = train.class_proba is not None
        if self.standardize:
            self.x_mean_ = train.X.mean(axis=0).astype(np.float32)
            sd = train.X.std(axis=0)
            self.x_scale_ = np.where(sd > 1e-12, sd, 1.0).astype(np.float32)
        else:
            self.x_mean_ = np.zeros(X.shape[1], np.float32)
            self.x_scale_ = np.ones(X.shape[1], np.float32)
        self.history_ = {}
        self.hidden_ = _resolve_hidden(self.hidden, train.X.shape[0])
        n_threads = _fit_threads(X.shape[1], self.n_classes_ + self.n_experts_, self.head,
                                 self.hidden_, int(self.batch_size))
        with _torch_session(rng, n_threads) as gen:
            self._fit_parts(train, val, gen)
        self.validation_cost_ = float(self._validation_cost(val))
        return self

    def _resolve_n_classes(self, y: np.ndarray, A: np.ndarray, cost_matrix: Any) -> int:
        """K from the n_classes parameter, else the cost matrix, else the data."""
        if self.n_classes is not None:
            return int(self.n_classes)
        if cost_matrix is not None:
            return int(np.asarray(cost_matrix).shape[0])
        top = int(np.max(y)) if y.size else 0
        if A.size:
            top = max(top, int(A.max()))
        return max(2, top + 1)

    def _check_val(self, X_val, y_val, answers_val, sample_weight_val, class_proba_val) -> _Part:
        """Validate an explicit validation split."""
        if y_val is None or answers_val is None:
            raise ValueError("give X_val, y_val and answers_val together")
        Xv = check_array(X_val, dtype=np.float32)
        if Xv.shape[1] != self.n_features_in_:
            raise ValueError(f"X_val has {Xv.shape[1]} features, X has {self.n_features_in_}")
        yv = _check_y(y_val, self.n_classes_, "y_val")
        Av, Wv = _check_answers_weights(answers_val, sample_weight_val, Xv.shape[0])
        if yv.shape[0] != Xv.shape[0] or Av.shape[1] != self.n_experts_:
            raise ValueError("validation arrays disagree in shape with each other or with fit")
        cv = costs_mod.cost_vectors(yv, Av, cost_matrix=self.cost_matrix_, fees=self.fees_)
        return _Part(Xv, yv, Av, Wv, cv,
                     _check_class_proba(class_proba_val, Xv.shape[0], self.n_classes_))

    def _std(self, X: np.ndarray) -> torch.Tensor:
        """Standardised float32 tensor of raw rows."""
        return torch.from_numpy(np.ascontiguousarray((X - self.x_mean_) / self.x_scale_,
                                                     dtype=np.float32))

    # ---- correctness model (shared by every router) ----------------------------------

    def _fit_correctness(self, train: _Part, val: _Part, gen: torch.Generator) -> None:
        """Fit P(expert j right | x) on the known answers, IPS-weighted; Platt on validation."""
        M, d = self.n_experts_, self.n_features_in_
        head = self.correctness_head or self.head
        net = _make_net(d, M, head, self.hidden_)
        self.correctness_net_ = net
        self.expert_platt_ = np.tile([1.0, 0.0], (M, 1))
        if M == 0:
            return
        known = train.known
        right = (train.answers == train.y[:, None]) & known
        # start from each expert's smoothed accuracy (rule of succession)
        prior = (right.sum(0) + 1.0) / (known.sum(0) + 2.0)
        with torch.no_grad():
            net[-1].bias.copy_(torch.from_numpy(_logit(prior).astype(np.float32)))
        if np.any(known.sum(0) == 0):
            warnings.warn("some expert has no known answer in the training split; its "
                          "correctness stays at the prior 0.5", stacklevel=3)
        rows = known.any(axis=1)
        if not rows.any():
            return
        tensors = (self._std(train.X[rows]), torch.from_numpy(right[rows].astype(np.float32)),
                   torch.from_numpy(train.weights[rows].astype(np.float32)))
        v_known = val.known
        v_right = ((val.answers == val.y[:, None]) & v_known).astype(np.float32)
        Xv = self._std(val.X)
        v_t, v_w = torch.from_numpy(v_right), torch.from_numpy(val.weights.astype(np.float32))
        settings = self._settings()
        if not v_known.any():
            warnings.warn("no known answer in the validation split: the correctness model "
                          "trains for a fixed 20 epochs", stacklevel=3)
            settings.max_epochs, settings.patience = min(20, settings.max_epochs), 10**9

        def loss_fn(m: nn.Module, xb: torch.Tensor, tb: torch.Tensor, wb: torch.Tensor):
            bce = F.binary_cross_entropy_with_logits(m(xb), tb, reduction="none")
            return (wb * bce).sum() / (wb > 0).sum().clamp(min=1)

        def val_score(m: nn.Module) -> tuple[float, float]:
            if not v_known.any():
                return (0.0, 0.0)
            bce = F.binary_cross_entropy_with_logits(m(Xv), v_t, reduction="none")
            return (float((v_w * bce).sum() / v_w.sum()), 0.0)

        self.history_["correctness"] = _train_loop(net, loss_fn, tensors, val_score, settings,
                                                   gen, "expert correctness")
        if self.calibrate:
            self._calibrate_correctness(val)

    def _calibrate_correctness(self, val: _Part) -> None:
        """Platt scaling per expert on the validation answers that are known."""
        Z = _forward(self.correctness_net_, val.X, self.x_mean_, self.x_scale_)
        report = self.calibration_.setdefault("experts", [])
        for j in range(self.n_experts_):
            k = val.known[:, j]
            t = (val.answers[k, j] == val.y[k]).astype(np.float64)
            a, b = cal.fit_platt(Z[k, j], t, val.weights[k, j],
                                  prior_strength=CALIBRATION_PRIOR)
            self.expert_platt_[j] = (a, b)
            before = cal.expected_calibration_error(cal.apply_platt(Z[k, j], 1, 0), t)
            after = cal.expected_calibration_error(cal.apply_platt(Z[k, j], a, b), t)
            report.append({"expert": j, "n_known": int(k.sum()), "platt_a": a, "platt_b": b,
                           "ece_before": before, "ece_after": after})

    def _correct_proba(self, X: np.ndarray) -> np.ndarray:
        """Calibrated P(expert j right | x), (n, M) float64."""
        if self.n_experts_ == 0:
            return np.zeros((X.shape[0], 0))
        Z = _forward(self.correctness_net_, X, self.x_mean_, self.x_scale_).astype(np.float64)
        return cal.apply_platt(Z, self.expert_platt_[:, 0], self.expert_platt_[:, 1])

    def _imputed(self, part: _Part, q: np.ndarray) -> np.ndarray:
        """Expected option costs given the truth and P(right): fills unknown answers."""
        P = _onehot(part.y, self.n_classes_)
        return costs_mod.expected_cost_vectors(P, q, cost_matrix=self.cost_matrix_,
                                               fees=self.fees_)

    def _filled_costs(self, part: _Part) -> np.ndarray:
        """Realised costs with unknown answers replaced by their expected cost."""
        if not np.isnan(part.costs).any():
            return part.costs
        return costs_mod.impute_missing_costs(part.costs,
                                              self._imputed(part, self._correct_for(part)))

    def _correct_for(self, part: _Part) -> np.ndarray:
        """P(expert right) for the cases of a split."""
        return self._correct_proba(part.X)

    def _validation_cost(self, val: _Part) -> float:
        """Mean realised (imputed where unknown) cost of the fitted routing on val."""
        routes = self.predict_route(val.X, **self._proba_kw(val))
        return float(realised_costs(self._filled_costs(val), routes).mean())

    def _proba_kw(self, part: _Part) -> dict[str, Any]:
        """Extra predict keywords (two-stage class probabilities)."""
        return {}

    # ---- prediction ------------------------------------------------------------------

    def _check_X(self, X: ArrayLike) -> np.ndarray:
        """check_is_fitted, then a float32 matrix of the fitted width."""
        check_is_fitted(self)
        X = check_array(X, dtype=np.float32)
        if X.shape[1] != self.n_features_in_:
            raise ValueError(f"X has {X.shape[1]} features, the router was fitted with "
                             f"{self.n_features_in_}")
        return X

    def predict_route(self, X: ArrayLike, **kwargs: Any) -> np.ndarray:
        """Chosen option per case: ``k < K`` the model decides class k, ``K + j`` expert j.

        Parameters
        ----------
        X : array-like of shape (n, d)

        Returns
        -------
        ndarray of int64, shape (n,)
        """
        return np.argmin(self.predict_costs(X, **kwargs), axis=1).astype(np.int64)

    # ---- storage ---------------------------------------------------------------------

    def get_arrays(self) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
        """The fitted router as plain arrays plus a JSON-able description.

        Returns
        -------
        arrays : dict of str to ndarray
            Every weight, the standardisation, fees, cost matrix and calibration.
        meta : dict
            JSON-able: router class, hyperparameters, sizes, calibration report and
            validation cost. Rebuild with :func:`router_from_arrays` ``(arrays, meta)``.
        """
        check_is_fitted(self)
        arrays = {"x_mean": self.x_mean_, "x_scale": self.x_scale_, "fees": self.fees_,
                  "cost_matrix": self.cost_matrix_, "expert_platt": self.expert_platt_}
        for name in self._net_names:
            net = getattr(self, f"{name}_net_", None)
            if net is not None:
                arrays.update(_net_arrays(name, net))
        arrays.update(self._extra_arrays())
        params = {k: v for k, v in self.get_params().items() if k != "console"}
        params["hidden"] = [int(h) for h in self.hidden_]  # resolved widths
        rs = params.get("random_state")
        params["random_state"] = rs if rs is None or isinstance(rs, int) else None
        meta = {"format_version": ARRAYS_FORMAT, "router": type(self).__name__,
                "params": params, "n_features_in": int(self.n_features_in_),
                "n_classes": int(self.n_classes_), "n_experts": int(self.n_experts_),
                "two_stage": bool(self.two_stage_), "calibration": _jsonable(self.calibration_),
                "validation_cost": float(self.validation_cost_)}
        return {k: np.asarray(v).copy() for k, v in arrays.items()}, meta

    def _extra_arrays(self) -> dict[str, np.ndarray]:
        """Subclass arrays beyond the networks."""
        return {}

    @classmethod
    def from_arrays(cls, arrays: Mapping[str, np.ndarray], meta: Mapping[str, Any]) -> Any:
        """Rebuild a fitted router of this class from :meth:`get_arrays` output.

        Parameters
        ----------
        arrays : mapping of str to ndarray
        meta : mapping
            The JSON-able description returned beside the arrays.
        """
        router = router_from_arrays(arrays, meta)
        if not isinstance(router, cls):
            raise ValueError(f"the arrays describe a {type(router).__name__}, not {cls.__name__}")
        return router

    def _restore(self, arrays: Mapping[str, np.ndarray], meta: Mapping[str, Any]) -> None:
        """Set the fitted attributes from get_arrays output."""
        d, K, M = int(meta["n_features_in"]), int(meta["n_classes"]), int(meta["n_experts"])
        self.n_features_in_, self.n_classes_, self.n_experts_ = d, K, M
        self.two_stage_ = bool(meta["two_stage"])
        self.x_mean_ = np.asarray(arrays["x_mean"], np.float32)
        self.x_scale_ = np.asarray(arrays["x_scale"], np.float32)
        self.fees_ = np.asarray(arrays["fees"], np.float64).reshape(-1)
        self.cost_matrix_ = np.asarray(arrays["cost_matrix"], np.float64)
        self.expert_platt_ = np.asarray(arrays["expert_platt"], np.float64).reshape(M, 2)
        self.calibration_ = dict(meta.get("calibration", {}))
        self.validation_cost_ = float(meta.get("validation_cost", float("nan")))
        self.history_ = {}
        self.hidden_ = tuple(int(h) for h in self.hidden)
        head = self.correctness_head or self.head
        self.correctness_net_ = _load_net(_make_net(d, M, head, self.hidden_),
                                          "correctness", arrays)


def _jsonable(obj: Any) -> Any:
    """Plain Python (JSON-able) copy of nested dicts/lists of numpy scalars."""
    if isinstance(obj, Mapping):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, (np.floating, float)):
        return None if not np.isfinite(obj) else float(obj)
    if isinstance(obj, (np.integer, int)) and not isinstance(obj, bool):
        return int(obj)
    return obj


# --------------------------------------------------------------------------------------
# shared constructor arguments (documented once)
# --------------------------------------------------------------------------------------

_COMMON_PARAMS_DOC = """
    n_classes : int, optional
        Number of classes K; by default the cost matrix's size, else ``max(y, answers) + 1``.
    head : {"mlp", "linear"}, default="mlp"
        Form of the networks: a ReLU MLP with layer widths ``hidden``, or linear.
    hidden : tuple of int, optional
        Hidden layer widths of the MLP. Default: ``(64, 64, 64)`` when the training
        split has at least 5,000 cases, else ``(64, 64)``; the widths used are
        ``hidden_``. Measured: on the synthetic scenario (16,000 training cases, all
        answers) three layers cut the plug-in's gap to the Bayes cost from 0.013-0.014
        to 0.010-0.011 (seeds 0 and 1; widths 128 or 256 did not help), but on digits
        (about 1,000 training cases) they made the plug-in under-defer (k = 8: cost
        0.022 against 0.015 with two layers).
    correctness_head : {"mlp", "linear"}, optional
        Form of the correctness model; defaults to ``head``.
    max_epochs : int, default=200
        Upper bound on passes over the training split (per network).
    batch_size : int, default=512
        Rows per Adam step; on small data it shrinks so that an epoch has about 20
        steps (but at least 32 rows).
    learning_rate : float, default=1e-3
        Adam step size.
    weight_decay : float, default=1e-4
        Adam's L2 penalty.
    patience : int, default=15
        Epochs without a better validation score before training stops; the weights of
        the best epoch are kept.
    early_stopping : {"cost", "loss"} or None
        Validation score that picks the epoch of the classifier / scorer: the system
        cost of the routing (ties broken by the loss), or the loss (log-loss of the
        classifier, surrogate loss of the scorer; ties broken by the cost). The
        correctness model always stops on its validation log-loss. Default "loss" for
        :class:`PluginRouter` (its classifier must give calibrated probabilities, and
        the log-loss is a far less noisy signal than the routed cost: on the synthetic
        scenario it gave a gap to the Bayes cost of 0.012 against 0.014). For
        :class:`SurrogateRouter` the default None means "loss" for the asymmetric
        surrogate (gap 0.015-0.016 against 0.023 by "cost") and "cost" for the others
        (softmax: 0.026 by "cost" against 0.030 by "loss").
    validation_fraction : float, default=0.2
        Share of the cases held out (stratified by label, seeded) for early stopping and
        calibration when ``fit`` gets no explicit ``X_val``.
    calibrate : bool, default=True
        Fit temperature / Platt scaling on the validation split.
    standardize : bool, default=True
        Centre and scale the features with training means and standard deviations.
    random_state : int, numpy Generator or None, default=None
        Seeds the split, the initial weights and the batch order.
    verbose : bool, default=False
        Show a rich progress bar while training.
    console : rich.console.Console, optional
        Where the progress bar goes (default: rich's console).
"""

_FIT_DOC = """
        Parameters
        ----------
        X : array-like of shape (n, d)
            Case features.
        y : array-like of int, shape (n,)
            Verified truth, ``0 .. K-1``.
        answers : array-like of int, shape (n, M)
            Expert answers, ``-1`` where the expert was not asked.
        fees : array-like of shape (M,)
            Fee of each expert per case, in the unit of one error.
        cost_matrix : array-like of shape (K, K), optional
            Error-cost matrix ``C[y, k]`` (default 0/1).
        sample_weight : array-like of shape (n, M), optional
            Inverse selection probability of each known answer (NaN or 1 for uniform).
        X_val, y_val, answers_val, sample_weight_val : optional
            An explicit validation split; otherwise ``validation_fraction`` of the cases.

        Returns
        -------
        self
"""


def _init_common(self: _BaseRouter, kw: dict[str, Any]) -> None:
    """Store constructor arguments unchanged (scikit-learn convention)."""
    for k, v in kw.items():
        if k not in ("self", "__class__"):
            setattr(self, k, v)


# --------------------------------------------------------------------------------------
# plug-in router
# --------------------------------------------------------------------------------------


def _class_accuracy(part: _Part, n_classes: int, strength: float = 2.0) -> np.ndarray:
    """Each expert's accuracy per true class, (M, K), IPS-weighted and shrunk.

    Shrunk toward the expert's overall accuracy with a Beta prior of ``strength``
    pseudo-answers (common practice); overall accuracy uses the rule of succession.
    """
    known = part.known
    right = (part.answers == part.y[:, None]) & known
    w = part.weights  # 0 where unknown
    overall = ((w * right).sum(0) + 1.0) / (w.sum(0) + 2.0)  # (M,)
    Y = _onehot(part.y, n_classes)  # (n, K)
    num = (w * right).T @ Y  # (M, K)
    den = w.T @ Y
    return (num + strength * overall[:, None]) / (den + strength)


class PluginRouter(_BaseRouter):
    __doc__ = """Classifier plus per-expert correctness models; route to the least expected cost.

    The classifier is trained by cross-entropy, the correctness model (one output per
    expert) by binary log-loss on the known answers only, each weighted by the inverse
    of its selection probability. A case goes to ``argmin_r E[c_r | x]`` with the
    expected costs of :func:`routeplan.costs.expected_cost_vectors`: post-hoc deferral
    (Narasimhan, Jitkrittum, Menon, Rawat & Kumar, "Post-hoc estimators for learning to
    defer to an expert", NeurIPS 2022). Given ``class_proba`` (a model the team already
    has), only the routing is learned: two-stage learning to defer (Mao, Mohri & Zhong,
    "Two-Stage Learning to Defer with Multiple Experts", NeurIPS 2023).

    The classifier is early-stopped on the validation system cost of the full routing
    (correctness model fixed, temperature refitted each epoch when ``calibrate``), ties
    broken by validation log-loss. Class probabilities are temperature-scaled and
    correctness probabilities Platt-scaled on the validation split
    (:mod:`routeplan.calibration`).

    Parameters
    ----------""" + _COMMON_PARAMS_DOC + """
    Attributes
    ----------
    n_features_in_, n_classes_, n_experts_ : int
    hidden_ : tuple of int
        Hidden layer widths used (``hidden`` resolved).
    fees_ : ndarray of shape (M,)
    cost_matrix_ : ndarray of shape (K, K)
    classifier_net_ : torch.nn.Module or None
        None in two-stage mode.
    correctness_net_ : torch.nn.Module
    class_temperature_ : float
    expert_platt_ : ndarray of shape (M, 2)
        Platt ``(a, b)`` per expert.
    class_accuracy_ : ndarray of shape (M, K)
        Each expert's shrunk accuracy per true class (the class route).
    expert_stack_ : ndarray of shape (M, 3)
        Stacking coefficients per expert: network logit, class route, intercept.
    calibration_ : dict
        ECE before/after calibration on the validation split (optimistic: fitted there).
    validation_cost_ : float
        Validation system cost of the fitted router (unknown answers imputed).
    history_ : dict
        Validation scores per epoch of each network.
    """

    _net_names = ("classifier", "correctness")

    def __init__(self, *, n_classes: int | None = None, head: str = "mlp",
                 hidden: tuple[int, ...] | None = None, correctness_head: str | None = None,
                 max_epochs: int = 200, batch_size: int = 512, learning_rate: float = 1e-3,
                 weight_decay: float = 1e-4, patience: int = 15,
                 early_stopping: str = "loss", validation_fraction: float = 0.2,
                 calibrate: bool = True,
                 standardize: bool = True, random_state: Any = None, verbose: bool = False,
                 console: Any = None) -> None:
        _init_common(self, locals())

    def fit(self, X: ArrayLike, y: ArrayLike, answers: ArrayLike, *, fees: ArrayLike,
            cost_matrix: ArrayLike | None = None, sample_weight: ArrayLike | None = None,
            X_val: ArrayLike | None = None, y_val: ArrayLike | None = None,
            answers_val: ArrayLike | None = None, sample_weight_val: ArrayLike | None = None,
            class_proba: ArrayLike | None = None, class_proba_val: ArrayLike | None = None
            ) -> PluginRouter:
        return self._fit(X, y, answers, fees=fees, cost_matrix=cost_matrix,
                         sample_weight=sample_weight, X_val=X_val, y_val=y_val,
                         answers_val=answers_val, sample_weight_val=sample_weight_val,
                         class_proba=class_proba, class_proba_val=class_proba_val)

    fit.__doc__ = """Fit the correctness model, then the classifier (unless two-stage).
""" + _FIT_DOC.replace("        Returns", """\
        class_proba, class_proba_val : array-like of shape (n, K), optional
            Two-stage mode: probabilities of the team's own model; only routing is learned
            and prediction then needs ``class_proba`` too.

        Returns""")

    def _fit_parts(self, train: _Part, val: _Part, gen: torch.Generator) -> None:
        """Correctness model first, then the classifier against the routed cost."""
        self.calibration_ = {}
        self._fit_correctness(train, val, gen)
        q_val = self._correct_proba(val.X)
        c_val = (val.costs if not np.isnan(val.costs).any() else
                 costs_mod.impute_missing_costs(val.costs, self._imputed(val, q_val)))
        if self.two_stage_:
            self.classifier_net_ = None
            Z = np.log(np.clip(val.class_proba, _EPS, 1.0))
        else:
            self.classifier_net_ = self._train_classifier(train, val, q_val, c_val, gen)
            Z = _forward(self.classifier_net_, val.X, self.x_mean_, self.x_scale_)
        self.class_temperature_ = cal.fit_temperature(Z, val.y) if self.calibrate else 1.0
        P_val = cal.apply_temperature(Z, self.class_temperature_)
        self.calibration_["classes"] = {
            "temperature": self.class_temperature_,
            "ece_before": cal.expected_calibration_error(cal.apply_temperature(Z, 1.0), val.y),
            "ece_after": cal.expected_calibration_error(P_val, val.y)}
        self._fit_class_route(train, val, P_val)

    def _fit_class_route(self, train: _Part, val: _Part, P_val: np.ndarray) -> None:
        """Per-class expert accuracy, and its stacking with the feature-based model."""
        M, K = self.n_experts_, self.n_classes_
        self.class_accuracy_ = _class_accuracy(train, K)
        self.expert_stack_ = np.tile([1.0, 0.0, 0.0], (M, 1))
        self.expert_stack_[:, 0] = self.expert_platt_[:, 0]
        self.expert_stack_[:, 2] = self.expert_platt_[:, 1]
        if M == 0 or not self.calibrate:
            return
        z_x = _forward(self.correctness_net_, val.X, self.x_mean_, self.x_scale_)
        z_c = _logit(P_val @ self.class_accuracy_.T)
        reports = self.calibration_.get("experts", [{} for _ in range(M)])
        for j, rep in enumerate(reports):
            k = val.known[:, j]
            t = (val.answers[k, j] == val.y[k]).astype(np.float64)
            feats = np.column_stack([z_x[k, j], z_c[k, j]])
            coef = cal.fit_stack(feats, t, val.weights[k, j], prior_strength=CALIBRATION_PRIOR)
            if coef[0] == 1.0 and not np.any(coef[1:]):
                continue  # too few answers: keep the Platt-scaled feature model
            self.expert_stack_[j] = coef
            rep.update({"stack": coef.tolist(), "ece_stacked": cal.expected_calibration_error(
                cal.apply_stack(feats, coef), t)})

    def _train_classifier(self, train: _Part, val: _Part, q_val: np.ndarray, c_val: np.ndarray,
                          gen: torch.Generator) -> nn.Module:
        """Cross-entropy classifier, early-stopped on the plug-in routing's validation cost."""
        net = _make_net(self.n_features_in_, self.n_classes_, self.head, self.hidden_)
        tensors = (self._std(train.X), torch.from_numpy(train.y))
        Xv, rows = self._std(val.X), np.arange(val.y.shape[0])

        def loss_fn(m: nn.Module, xb: torch.Tensor, yb: torch.Tensor) -> torch.Tensor:
            return F.cross_entropy(m(xb), yb)

        def val_score(m: nn.Module) -> tuple[float, float]:
            Z = m(Xv).numpy().astype(np.float64)
            T = cal.fit_temperature(Z, val.y) if self.calibrate else 1.0
            P = cal.apply_temperature(Z, T)
            ec = costs_mod.expected_cost_vectors(P, q_val, cost_matrix=self.cost_matrix_,
                                                 fees=self.fees_)
            cost = realised_costs(c_val, ec.argmin(axis=1)).mean()
            nll = float(-np.log(P[rows, val.y] + _EPS).mean())
            return ((nll, float(cost)) if self.early_stopping in ("loss", None)
                    else (float(cost), nll))

        self.history_["classifier"] = _train_loop(net, loss_fn, tensors, val_score,
                                                  self._settings(), gen, "classifier")
        return net

    def _proba_kw(self, part: _Part) -> dict[str, Any]:
        """Pass the imported probabilities in two-stage mode."""
        return {"class_proba": part.class_proba} if self.two_stage_ else {}

    def _correct_for(self, part: _Part) -> np.ndarray:
        """P(expert right) for a split, with the imported probabilities if two-stage."""
        if not hasattr(self, "expert_stack_"):
            return self._correct_proba(part.X)
        P = cal.apply_temperature(self._class_logits(part.X, part.class_proba),
                                  self.class_temperature_)
        return self._stacked_correct(part.X, P)

    def _stacked_correct(self, X: np.ndarray, P: np.ndarray) -> np.ndarray:
        """P(expert right | x) from the feature model and the class route, stacked."""
        M = self.n_experts_
        if M == 0:
            return np.zeros((X.shape[0], 0))
        z_x = _forward(self.correctness_net_, X, self.x_mean_, self.x_scale_).astype(np.float64)
        z_c = _logit(P @ self.class_accuracy_.T)
        S = self.expert_stack_
        return expit(S[:, 0] * z_x + S[:, 1] * z_c + S[:, 2])

    def _proba_and_correct(self, X: np.ndarray, class_proba: ArrayLike | None
                           ) -> tuple[np.ndarray, np.ndarray]:
        """Calibrated class probabilities and P(expert right), both (n, .)."""
        P = cal.apply_temperature(self._class_logits(X, class_proba), self.class_temperature_)
        return P, self._stacked_correct(X, P)

    def _class_logits(self, X: np.ndarray, class_proba: ArrayLike | None) -> np.ndarray:
        """Class scores from the classifier, or log of the imported probabilities."""
        if self.two_stage_:
            if class_proba is None:
                raise ValueError("this router was fitted in two-stage mode: pass class_proba")
            P = _check_class_proba(class_proba, X.shape[0], self.n_classes_)
            return np.log(np.clip(P, _EPS, 1.0))
        if class_proba is not None:
            raise ValueError("class_proba is only for routers fitted with class_proba")
        return _forward(self.classifier_net_, X, self.x_mean_, self.x_scale_)

    def predict_proba(self, X: ArrayLike, *, class_proba: ArrayLike | None = None) -> np.ndarray:
        """Calibrated class probabilities ``P(y = k | x)``, shape (n, K).

        Parameters
        ----------
        X : array-like of shape (n, d)
        class_proba : array-like of shape (n, K), optional
            Required in two-stage mode (the imported model's probabilities).
        """
        X = self._check_X(X)
        return cal.apply_temperature(self._class_logits(X, class_proba), self.class_temperature_)

    def predict_expert_correct(self, X: ArrayLike, *, class_proba: ArrayLike | None = None
                               ) -> np.ndarray:
        """Calibrated ``P(expert j right | x)``, shape (n, M).

        A logistic stack, fitted on the validation answers, of the feature-based
        correctness model and of ``sum_y P(y | x) A[j, y]`` with ``A`` each expert's
        accuracy per true class on the training answers.

        Parameters
        ----------
        X : array-like of shape (n, d)
        class_proba : array-like of shape (n, K), optional
            Required in two-stage mode.
        """
        return self._proba_and_correct(self._check_X(X), class_proba)[1]

    def predict_costs(self, X: ArrayLike, *, class_proba: ArrayLike | None = None) -> np.ndarray:
        """Estimated expected cost of each option, shape (n, K + M).

        Parameters
        ----------
        X : array-like of shape (n, d)
        class_proba : array-like of shape (n, K), optional
            Required in two-stage mode.
        """
        return _by_chunks(self._costs_chunk, self._check_X(X), class_proba)

    def _costs_chunk(self, X: np.ndarray, class_proba: np.ndarray | None) -> np.ndarray:
        """Expected option costs of a chunk of validated rows."""
        P, q = self._proba_and_correct(X, class_proba)
        return costs_mod.expected_cost_vectors(P, q, cost_matrix=self.cost_matrix_,
                                               fees=self.fees_)

    def predict_route(self, X: ArrayLike, *, class_proba: ArrayLike | None = None) -> np.ndarray:
        """Option of least expected cost per case (``K + j`` = expert j), shape (n,)."""
        def routes(xs: np.ndarray, ps: np.ndarray | None) -> np.ndarray:
            return np.argmin(self._costs_chunk(xs, ps), axis=1).astype(np.int64)

        return _by_chunks(routes, self._check_X(X), class_proba)

    def _extra_arrays(self) -> dict[str, np.ndarray]:
        """The class temperature, per-class accuracies and stacking weights."""
        return {"class_temperature": np.array([self.class_temperature_]),
                "class_accuracy": self.class_accuracy_, "expert_stack": self.expert_stack_}

    def _restore(self, arrays: Mapping[str, np.ndarray], meta: Mapping[str, Any]) -> None:
        """Rebuild the networks and calibration."""
        super()._restore(arrays, meta)
        self.class_temperature_ = float(np.asarray(arrays["class_temperature"]).reshape(-1)[0])
        M, K = self.n_experts_, self.n_classes_
        self.class_accuracy_ = np.asarray(arrays["class_accuracy"], np.float64).reshape(M, K)
        self.expert_stack_ = np.asarray(arrays["expert_stack"], np.float64).reshape(M, 3)
        self.classifier_net_ = None if self.two_stage_ else _load_net(
            _make_net(self.n_features_in_, self.n_classes_, self.head, self.hidden_),
            "classifier", arrays)


# --------------------------------------------------------------------------------------
# joint surrogate router
# --------------------------------------------------------------------------------------


class SurrogateRouter(_BaseRouter):
    __doc__ = """One scorer with K + M outputs trained end to end by a learning-to-defer surrogate.

    ``loss="softmax"``: the cost-sensitive softmax cross-entropy of Mozannar & Sontag
    ("Consistent Estimators for Learning to Defer to an Expert", ICML 2020) in the
    multi-expert form of Verma, Barrejon & Nalisnick (AISTATS 2023); the route is
    ``argmax g``. ``loss="ova"``: the one-vs-all logistic surrogate of Verma & Nalisnick
    ("Calibrated Learning to Defer with One-vs-All Classifiers", ICML 2022), generalised
    to costs (:func:`routeplan.surrogate.one_vs_all_surrogate`); its sigmoid outputs
    estimate the expected option costs, Platt-scaled on validation, and the route is the
    least estimated cost. ``loss="asymmetric"``: the asymmetric softmax surrogate of Cao,
    Mozannar, Feng, Wei & An ("In Defense of Softmax Parametrization for Calibrated and
    Consistent Learning to Defer", NeurIPS 2023;
    :func:`routeplan.surrogate.asymmetric_softmax_surrogate`): cross-entropy on the class
    scores plus a binary log-loss per expert on the asymmetric deferral probability, so
    that one network estimates both ``P(y | x)`` and ``P(expert j right | x)``; these are
    temperature- / Platt-scaled on validation and the route is the least expected cost
    (as for the plug-in). Measured (benchmarks/bench_learner.py, seeds 0 and 1): on the
    synthetic scenario (20,000 cases, all answers, 3 x 64 MLP) it came within
    0.012-0.013 of the Bayes cost against 0.017-0.020 for the softmax surrogate and
    0.010-0.011 for the plug-in; on digits (about 1,000 training cases) it trailed both
    (k = 5: 0.043 against 0.033 softmax, 0.025 plug-in).

    Unknown expert answers: a correctness model (as in :class:`PluginRouter`) is fitted
    first on the known answers, weighted by inverse selection probability, and

    - ``missing="impute"`` (default): an unknown option cost is replaced by its expected
      value given the truth, ``fee_j + q_j(x) C[y, y] + (1 - q_j(x)) w[y]`` (asymmetric:
      the unknown 0/1 correctness target is replaced by ``q_j(x)``);
    - ``missing="doubly_robust"`` (softmax only): every expert cost becomes
      ``m + 1[known] * ipw * (c - m)`` with ``m`` the imputed value -- unbiased when either
      the correctness model or the selection probabilities are right (the doubly robust
      estimator of Dudik, Langford & Li, ICML 2011).

    ``predict_costs`` of the softmax router are the calibrated plug-in estimates
    (temperature-scaled softmax over the K class scores, Platt-scaled correctness model):
    the softmax scores themselves are not probabilities of anything (Verma & Nalisnick,
    2022). They can disagree with ``predict_route`` on borderline cases; the share of
    validation cases where they agree is ``calibration_["route_agreement"]``.

    With ``calibrate``, the softmax router's route adds one offset per expert to its
    deferral scores, chosen on the validation split (grid search, coordinate descent) to
    minimise the routed cost: a post-hoc correction of the deferral threshold, in the
    spirit of the post-hoc estimators of Narasimhan, Jitkrittum, Menon, Rawat & Kumar
    (NeurIPS 2022), aimed at the softmax surrogate's over-deferral. Measured: synthetic
    scenario gap 0.0208 -> 0.0201 and 0.0183 -> 0.0170 (seeds 0, 1); digits with the
    Mozannar & Sontag expert, k = 2: 0.057 -> 0.037, k = 5 unchanged, k = 8 0.033 ->
    0.030 (2 x 64 MLP, mean of seeds 0 and 1).

    Parameters
    ----------
    loss : {"softmax", "ova", "asymmetric"}, default="softmax"
    alpha : float, default=1.0
        Weight of the deferral terms of the softmax surrogate (1 keeps consistency; see
        :func:`routeplan.surrogate.softmax_cost_surrogate`).
    missing : {"impute", "doubly_robust"}, default="impute"
""" + _COMMON_PARAMS_DOC + """
    Attributes
    ----------
    scorer_net_, correctness_net_ : torch.nn.Module
    cost_scale_ : float
        Bound ``B`` on option costs (largest error cost plus largest fee), used by OvA.
    class_temperature_ : float
    option_platt_ : ndarray of shape (1 + M, 2)
        OvA: Platt ``(a, b)`` shared by the class outputs, then one per expert.
        Asymmetric: rows ``1 ..`` hold Platt ``(a, b)`` of each expert's deferral logit.
        Softmax: ``option_platt_[1 + j, 1]`` is the offset added to expert ``j``'s
        deferral score when routing (0 without ``calibrate``).
    expert_platt_ : ndarray of shape (M, 2)
    calibration_, validation_cost_, history_ : as in :class:`PluginRouter`
    """

    _net_names = ("scorer", "correctness")

    def __init__(self, *, loss: str = "softmax", alpha: float = 1.0, missing: str = "impute",
                 n_classes: int | None = None, head: str = "mlp",
                 hidden: tuple[int, ...] | None = None, correctness_head: str | None = None,
                 max_epochs: int = 200, batch_size: int = 512, learning_rate: float = 1e-3,
                 weight_decay: float = 1e-4, patience: int = 15,
                 early_stopping: str | None = None, validation_fraction: float = 0.2,
                 calibrate: bool = True,
                 standardize: bool = True, random_state: Any = None, verbose: bool = False,
                 console: Any = None) -> None:
        _init_common(self, locals())

    def _check_params(self) -> None:
        """Also check loss, alpha and missing."""
        super()._check_params()
        if self.loss not in ("softmax", "ova", "asymmetric"):
            raise ValueError(f"loss must be 'softmax', 'ova' or 'asymmetric', got {self.loss!r}")
        if not self.alpha > 0:
            raise ValueError(f"alpha must be > 0, got {self.alpha!r}")
        if self.missing not in ("impute", "doubly_robust"):
            raise ValueError(f"missing must be 'impute' or 'doubly_robust', got {self.missing!r}")
        if self.missing == "doubly_robust" and self.loss != "softmax":
            raise ValueError("missing='doubly_robust' needs loss='softmax' (OvA targets must "
                             "stay in [0, 1])")
        if self.loss != "softmax" and self.alpha != 1.0:
            raise ValueError("alpha applies to the softmax surrogate only")

    def fit(self, X: ArrayLike, y: ArrayLike, answers: ArrayLike, *, fees: ArrayLike,
            cost_matrix: ArrayLike | None = None, sample_weight: ArrayLike | None = None,
            X_val: ArrayLike | None = None, y_val: ArrayLike | None = None,
            answers_val: ArrayLike | None = None, sample_weight_val: ArrayLike | None = None
            ) -> SurrogateRouter:
        return self._fit(X, y, answers, fees=fees, cost_matrix=cost_matrix,
                         sample_weight=sample_weight, X_val=X_val, y_val=y_val,
                         answers_val=answers_val, sample_weight_val=sample_weight_val)

    fit.__doc__ = "Fit the correctness model, then the K + M scorer.\n" + _FIT_DOC

    def _fit_parts(self, train: _Part, val: _Part, gen: torch.Generator) -> None:
        """Correctness model (imputer) first, then the scorer, then calibration."""
        self.calibration_ = {}
        K, M = self.n_classes_, self.n_experts_
        bound = float(self.cost_matrix_.max() + (self.fees_.max() if M else 0.0))
        # float32-exact, so that float32 costs never exceed it after rounding
        self.cost_scale_ = float(np.float32(bound)) if bound > 0 else 1.0
        self._fit_correctness(train, val, gen)
        c_val = self._filled_costs(val)
        net = _make_net(self.n_features_in_, K + M, self.head, self.hidden_)
        tensors = (self._std(train.X), *self._targets(train))
        Xv, v_targets = self._std(val.X), self._targets(val)

        def val_score(m: nn.Module) -> tuple[float, float]:
            G = m(Xv)
            cost = realised_costs(c_val, self._raw_routes(G.numpy())).mean()
            loss = float(self._loss(G, *v_targets))
            return (loss, float(cost)) if self._stop_on() == "loss" else (float(cost), loss)

        self.history_["scorer"] = _train_loop(net, lambda m, xb, *tb: self._loss(m(xb), *tb),
                                              tensors, val_score, self._settings(), gen,
                                              f"{self.loss} surrogate")
        self.scorer_net_ = net
        self._calibrate_scorer(val, c_val)

    def _stop_on(self) -> str:
        """The early-stopping score: as given, else "loss" for asymmetric, "cost" otherwise."""
        if self.early_stopping is not None:
            return self.early_stopping
        return "loss" if self.loss == "asymmetric" else "cost"

    def _targets(self, part: _Part) -> tuple[torch.Tensor, ...]:
        """Training targets of a split: option costs, or (truth, P(expert right))."""
        if self.loss != "asymmetric":
            return (torch.from_numpy(self._training_costs(part).astype(np.float32)),)
        right = (part.answers == part.y[:, None]).astype(np.float64)
        if not part.known.all():
            right = np.where(part.known, right, self._correct_proba(part.X))
        return torch.from_numpy(part.y), torch.from_numpy(right.astype(np.float32))

    def _raw_routes(self, G: np.ndarray) -> np.ndarray:
        """Routes from uncalibrated scores (used while training)."""
        if self.loss != "asymmetric":
            return G.argmax(axis=1)
        identity = np.tile([1.0, 0.0], (self.n_experts_, 1))
        P, q = self._asym_proba(G.astype(np.float64), 1.0, identity)
        return costs_mod.expected_cost_vectors(P, q, cost_matrix=self.cost_matrix_,
                                               fees=self.fees_).argmin(axis=1)

    def _asym_proba(self, G: np.ndarray, T: float, platt: np.ndarray
                    ) -> tuple[np.ndarray, np.ndarray]:
        """Class probabilities and P(expert right) from asymmetric-softmax scores."""
        K = self.n_classes_
        P = cal.apply_temperature(G[:, :K], T)
        z = G[:, K:] - _lse_without_max(G[:, :K])[:, None]
        return P, cal.apply_platt(z, platt[:, 0], platt[:, 1])

    def _loss(self, logits: torch.Tensor, *targets: torch.Tensor) -> torch.Tensor:
        """The chosen surrogate, mean over the batch."""
        if self.loss == "asymmetric":
            return sur.asymmetric_softmax_surrogate(logits, *targets)
        c = targets[0]
        if self.loss == "softmax":
            return sur.softmax_cost_surrogate(logits, c, alpha=float(self.alpha),
                                              n_classes=self.n_classes_)
        return sur.one_vs_all_surrogate(logits, c, n_classes=self.n_classes_,
                                        cost_scale=self.cost_scale_)

    def _training_costs(self, train: _Part) -> np.ndarray:
        """Option costs with unknown answers imputed (or doubly robust)."""
        if self.missing == "impute":
            return self._filled_costs(train)
        imputed = self._imputed(train, self._correct_proba(train.X))
        K = self.n_classes_
        out = imputed.copy()
        known = train.known
        ce = np.where(known, train.costs[:, K:], 0.0)
        out[:, K:] += np.where(known, train.weights * (ce - imputed[:, K:]), 0.0)
        out[:, :K] = train.costs[:, :K]
        return out

    def _calibrate_scorer(self, val: _Part, c_val: np.ndarray) -> None:
        """Temperature for the class scores; OvA: Platt per option group on validation."""
        K, M = self.n_classes_, self.n_experts_
        G = _forward(self.scorer_net_, val.X, self.x_mean_, self.x_scale_).astype(np.float64)
        self.option_platt_ = np.tile([1.0, 0.0], (1 + M, 1))
        if self.loss == "softmax":
            if self.calibrate and M:
                self.option_platt_[1:, 1] = _defer_offsets(G, c_val, K)
            self._fit_class_temperature(G, val)
            agree = self.predict_route(val.X) == np.argmin(self.predict_costs(val.X), axis=1)
            self.calibration_["route_agreement"] = float(agree.mean())
            return
        if self.loss == "asymmetric":
            self._calibrate_asymmetric(val, G)
            return
        self.class_temperature_ = 1.0
        B = self.cost_scale_
        before = cal.expected_calibration_error(self.predict_proba(val.X), val.y)
        if self.calibrate:
            t = 1.0 - c_val[:, :K] / B
            self.option_platt_[0] = cal.fit_platt(G[:, :K].ravel(), np.clip(t.ravel(), 0, 1))
            for j in range(M):
                k = val.known[:, j]
                tj = np.clip(1.0 - val.costs[k, K + j] / B, 0, 1)
                self.option_platt_[1 + j] = cal.fit_platt(G[k, K + j], tj, val.weights[k, j],
                                                            prior_strength=CALIBRATION_PRIOR)
        self.calibration_["classes"] = {
            "ece_before": before,
            "ece_after": cal.expected_calibration_error(self.predict_proba(val.X), val.y)}
        self.calibration_["options_platt"] = self.option_platt_.tolist()

    def _fit_class_temperature(self, G: np.ndarray, val: _Part) -> None:
        """Temperature of the K class scores on validation (1 without ``calibrate``), with its ECE report."""
        K = self.n_classes_
        T = cal.fit_temperature(G[:, :K], val.y) if self.calibrate else 1.0
        self.class_temperature_ = T
        P0, P1 = (cal.apply_temperature(G[:, :K], t) for t in (1.0, T))
        self.calibration_["classes"] = {
            "temperature": T, "ece_before": cal.expected_calibration_error(P0, val.y),
            "ece_after": cal.expected_calibration_error(P1, val.y)}

    def _calibrate_asymmetric(self, val: _Part, G: np.ndarray) -> None:
        """Temperature for the class scores, Platt per expert on the deferral logits."""
        K = self.n_classes_
        self._fit_class_temperature(G, val)
        if not self.calibrate:
            return
        z = G[:, K:] - _lse_without_max(G[:, :K])[:, None]
        for j in range(self.n_experts_):
            k = val.known[:, j]
            t = (val.answers[k, j] == val.y[k]).astype(np.float64)
            self.option_platt_[1 + j] = cal.fit_platt(z[k, j], t, val.weights[k, j],
                                                    prior_strength=CALIBRATION_PRIOR)
        self.calibration_["options_platt"] = self.option_platt_.tolist()

    # ---- prediction ------------------------------------------------------------------

    def _asym_chunk(self, X: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Calibrated class probabilities and P(expert right) of the asymmetric scorer."""
        G = _forward(self.scorer_net_, X, self.x_mean_, self.x_scale_).astype(np.float64)
        return self._asym_proba(G, self.class_temperature_, self.option_platt_[1:])

    def _ova_costs(self, X: np.ndarray) -> np.ndarray:
        """Calibrated OvA cost estimates ``B (1 - sigmoid(a g + b))``."""
        G = _forward(self.scorer_net_, X, self.x_mean_, self.x_scale_).astype(np.float64)
        K = self.n_classes_
        a = np.concatenate([np.full(K, self.option_platt_[0, 0]), self.option_platt_[1:, 0]])
        b = np.concatenate([np.full(K, self.option_platt_[0, 1]), self.option_platt_[1:, 1]])
        return self.cost_scale_ * (1.0 - cal.apply_platt(G, a, b))

    def _ova_proba(self, ec: np.ndarray) -> np.ndarray:
        """Class probabilities solving ``P C = E[c_class]`` (clipped, renormalised)."""
        K = self.n_classes_
        P = np.clip(ec[:, :K] @ np.linalg.pinv(self.cost_matrix_), 0.0, None)
        s = P.sum(axis=1, keepdims=True)
        return np.where(s > _EPS, P / np.where(s > _EPS, s, 1.0), 1.0 / K)

    def _ova_correct(self, ec: np.ndarray, P: np.ndarray) -> np.ndarray:
        """P(expert right) from the expert cost estimates, given class probabilities."""
        K, C = self.n_classes_, self.cost_matrix_
        right = (P @ np.diag(C))[:, None]
        wrong = (P @ costs_mod.wrong_answer_costs(C))[:, None]
        answer = ec[:, K:] - self.fees_[None, :]
        gap = wrong - right
        q = np.where(gap > _EPS, (wrong - answer) / np.where(gap > _EPS, gap, 1.0), 0.5)
        return np.clip(q, 0.0, 1.0)

    def predict_proba(self, X: ArrayLike) -> np.ndarray:
        """Class probabilities ``P(y = k | x)``, shape (n, K).

        Softmax: temperature-scaled softmax over the K class scores. OvA: solved from
        the calibrated class-option cost estimates.
        """
        X = self._check_X(X)
        if self.loss == "asymmetric":
            return self._asym_chunk(X)[0]
        if self.loss == "ova":
            return self._ova_proba(self._ova_costs(X))
        G = _forward(self.scorer_net_, X, self.x_mean_, self.x_scale_)[:, :self.n_classes_]
        return cal.apply_temperature(G, self.class_temperature_)

    def predict_expert_correct(self, X: ArrayLike) -> np.ndarray:
        """``P(expert j right | x)``, shape (n, M).

        Softmax: the calibrated correctness model. OvA: read from the scorer's expert
        outputs (Verma & Nalisnick, 2022).
        """
        X = self._check_X(X)
        if self.loss == "asymmetric":
            return self._asym_chunk(X)[1]
        if self.loss == "ova":
            ec = self._ova_costs(X)
            return self._ova_correct(ec, self._ova_proba(ec))
        return self._correct_proba(X)

    def predict_costs(self, X: ArrayLike) -> np.ndarray:
        """Estimated expected cost of each option, shape (n, K + M)."""
        return _by_chunks(lambda xs, _: self._costs_chunk(xs), self._check_X(X))

    def _costs_chunk(self, X: np.ndarray) -> np.ndarray:
        """Expected option costs of a chunk of validated rows."""
        if self.loss == "ova":
            return self._ova_costs(X)
        if self.loss == "asymmetric":
            P, q = self._asym_chunk(X)
            return costs_mod.expected_cost_vectors(P, q, cost_matrix=self.cost_matrix_,
                                                   fees=self.fees_)
        G = _forward(self.scorer_net_, X, self.x_mean_, self.x_scale_)[:, :self.n_classes_]
        P = cal.apply_temperature(G, self.class_temperature_)
        return costs_mod.expected_cost_vectors(P, self._correct_proba(X),
                                               cost_matrix=self.cost_matrix_, fees=self.fees_)

    def predict_route(self, X: ArrayLike) -> np.ndarray:
        """Chosen option per case (``K + j`` = expert j), shape (n,).

        Softmax: ``argmax`` of the scores. OvA: least calibrated cost estimate.
        """
        X = self._check_X(X)
        if self.loss == "asymmetric":
            return np.argmin(self.predict_costs(X), axis=1).astype(np.int64)
        if self.loss == "ova":
            return np.argmin(self._ova_costs(X), axis=1).astype(np.int64)
        G = _forward(self.scorer_net_, X, self.x_mean_, self.x_scale_)
        G[:, self.n_classes_:] += self.option_platt_[1:, 1]
        return np.argmax(G, axis=1).astype(np.int64)

    def _extra_arrays(self) -> dict[str, np.ndarray]:
        """Temperature, OvA Platt parameters and the cost bound."""
        return {"class_temperature": np.array([self.class_temperature_]),
                "option_platt": self.option_platt_, "cost_scale": np.array([self.cost_scale_])}

    def _restore(self, arrays: Mapping[str, np.ndarray], meta: Mapping[str, Any]) -> None:
        """Rebuild the scorer and calibration."""
        super()._restore(arrays, meta)
        self.class_temperature_ = float(np.asarray(arrays["class_temperature"]).reshape(-1)[0])
        self.cost_scale_ = float(np.asarray(arrays["cost_scale"]).reshape(-1)[0])
        self.option_platt_ = np.asarray(arrays["option_platt"], np.float64).reshape(-1, 2)
        self.scorer_net_ = _load_net(
            _make_net(self.n_features_in_, self.n_classes_ + self.n_experts_, self.head,
                      self.hidden_), "scorer", arrays)


_ROUTERS: dict[str, type[_BaseRouter]] = {"PluginRouter": PluginRouter,
                                          "SurrogateRouter": SurrogateRouter}


def router_from_arrays(arrays: Mapping[str, np.ndarray], meta: Mapping[str, Any]) -> _BaseRouter:
    """Rebuild a fitted router from :meth:`get_arrays` output (no code is loaded).

    Parameters
    ----------
    arrays : mapping of str to ndarray
    meta : mapping
        The JSON-able description returned beside the arrays.

    Returns
    -------
    PluginRouter or SurrogateRouter
    """
    if int(meta.get("format_version", -1)) != ARRAYS_FORMAT:
        raise ValueError(f"unknown router format {meta.get('format_version')!r}")
    cls = _ROUTERS.get(str(meta.get("router")))
    if cls is None:
        raise ValueError(f"unknown router class {meta.get('router')!r}")
    params = dict(meta["params"])
    params["hidden"] = tuple(int(h) for h in params["hidden"])
    router = cls(**params)
    router._restore(arrays, meta)
    return router


#: Candidate routers that :func:`fit_candidates` knows by name.
CANDIDATES: dict[str, tuple[type[_BaseRouter], dict[str, Any]]] = {
    "plugin": (PluginRouter, {"head": "mlp"}),
    "softmax-mlp": (SurrogateRouter, {"loss": "softmax", "head": "mlp"}),
    "ova-mlp": (SurrogateRouter, {"loss": "ova", "head": "mlp"}),
    "plugin-linear": (PluginRouter, {"head": "linear"}),
    "softmax-linear": (SurrogateRouter, {"loss": "softmax", "head": "linear"}),
    "ova-linear": (SurrogateRouter, {"loss": "ova", "head": "linear"}),
    "asym-mlp": (SurrogateRouter, {"loss": "asymmetric", "head": "mlp"}),
    "asym-linear": (SurrogateRouter, {"loss": "asymmetric", "head": "linear"}),
}
#: Candidates fitted by default, in order of preference (see
#: :func:`routeplan.selection.select_router`).
DEFAULT_CANDIDATES = ("plugin", "asym-mlp", "softmax-mlp", "ova-mlp")


def __getattr__(name: str) -> Any:
    """Re-export the selection functions lazily (routeplan.selection imports this module)."""
    if name in ("SelectionResult", "fit_candidates", "select_router"):
        from routeplan import selection

        return getattr(selection, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
