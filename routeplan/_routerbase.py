"""The shared base of the routers (private): validated data, fitting, calibration, storage.

:class:`_BaseRouter` holds what :class:`routeplan.plugin.PluginRouter` and
:class:`routeplan.joint.SurrogateRouter` share: input checks, the seeded train/validation
split, the correctness model ``P(expert j right | x)`` with its Platt scaling, prediction in
chunks, and the plain-array storage (:meth:`_BaseRouter.get_arrays`). The public face is
:mod:`routeplan.learner`.
"""

from __future__ import annotations

import contextlib
import os
import threading
import warnings
from collections.abc import Callable, Iterator, Mapping
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F
from numpy.typing import ArrayLike
from sklearn.base import BaseEstimator
from sklearn.model_selection import train_test_split
from sklearn.utils.validation import check_array, check_is_fitted
from torch import nn

from routeplan import blend
from routeplan import calibration as cal
from routeplan import costs as costs_mod
from routeplan.errors import ExpertsWithoutAnswers
from routeplan._nets import (
    _CHUNK,
    _fit_threads,
    _forward,
    _load_net,
    _LoopSettings,
    _make_net,
    _net_arrays,
    _standardised,
    _torch_session,
    _train_loop,
)

#: Version of the layout written by ``get_arrays`` (2 added the logistic blend's arrays;
#: version 1, without them, is still read: the network alone).
ARRAYS_FORMAT = 2
READABLE_FORMATS = (1, 2)
_EPS = 1e-12

CALIBRATION_PRIOR = 5.0
"""The routers' default ``calibration_prior``: precision of the prior that keeps each expert's Platt / stacking map near the identity
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


def _usable_cpus() -> int:
    """CPUs this process may run on (its affinity where the platform tells it)."""
    try:
        return len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        return os.cpu_count() or 1


#: Worker threads that score chunks side by side (at most two: the machines routeplan is
#: measured on have two cores).
_SCORE_WORKERS = max(1, min(2, _usable_cpus()))
#: Networks a fit may train side by side, each with torch on one thread (see
#: ``PluginRouter._fit_both``).
_FIT_WORKERS = _SCORE_WORKERS

# torch's thread count is process-wide: the first scorer in sets it to 1 and the last one out
# restores it, so that overlapping scorers never leave it at 1.
_THREADS_LOCK = threading.Lock()
_threads_state = {"users": 0, "saved": 0}


@contextlib.contextmanager
def _one_torch_thread() -> Iterator[None]:
    """Run torch on one thread inside the block (restored after): the chunks run side by side."""
    with _THREADS_LOCK:
        if _threads_state["users"] == 0:
            _threads_state["saved"] = torch.get_num_threads()
            torch.set_num_threads(1)
        _threads_state["users"] += 1
    try:
        yield
    finally:
        with _THREADS_LOCK:
            _threads_state["users"] -= 1
            if _threads_state["users"] == 0:
                torch.set_num_threads(_threads_state["saved"])


def _by_chunks(fn: Callable[[np.ndarray, Any], np.ndarray], X: np.ndarray,
               extra: Any = None) -> np.ndarray:
    """fn(X_chunk, extra_chunk) over row chunks, into one array (bounds peak memory).

    More than one chunk are scored by ``_SCORE_WORKERS`` threads, each with torch on one
    thread, so that the numpy steps between the networks run beside them: on 1,000,000
    cases this took scoring with the averaged router from 6.09 s to 3.48 s and with the
    plug-in router from 2.15 s to 1.52 s on two cores (``benchmarks/bench_learner.py`` [2],
    2026-12-03; peak memory 762 MB to 977 MB and 714 MB to 989 MB). The results are written
    in row order; they equal those of one chunk at a time (tested).
    """
    n = X.shape[0]
    if extra is not None:
        extra = np.asarray(extra)
        if extra.shape[0] != n:
            raise ValueError(f"class_proba has {extra.shape[0]} rows, X has {n}")

    def part(start: int) -> np.ndarray:
        stop = start + _CHUNK
        return fn(X[start:stop], None if extra is None else extra[start:stop])

    if n <= _CHUNK:
        return part(0)
    starts = range(0, n, _CHUNK)
    out = None
    with contextlib.ExitStack() as stack:
        if _SCORE_WORKERS > 1:
            stack.enter_context(_one_torch_thread())
            pool = stack.enter_context(ThreadPoolExecutor(_SCORE_WORKERS))
            parts = pool.map(part, starts)
        else:
            parts = map(part, starts)
        for start, chunk in zip(starts, parts):
            if out is None:
                out = np.empty((n, *chunk.shape[1:]), dtype=chunk.dtype)
            out[start:start + chunk.shape[0]] = chunk
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



#: Training cases from which the default MLP gets a third hidden layer (see ``hidden``).
_DEEP_FROM = 5_000


def _resolve_hidden(hidden: Any, n_train: int) -> tuple[int, ...]:
    """Layer widths: as given, else 3 x 64 from _DEEP_FROM training cases, else 2 x 64."""
    if hidden is not None:
        return tuple(int(h) for h in hidden)
    return (64, 64, 64) if n_train >= _DEEP_FROM else (64, 64)


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
        if not self.calibration_prior >= 0:
            raise ValueError(f"calibration_prior must be >= 0, got {self.calibration_prior!r}")

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

    def _correctness_net(self) -> nn.Module:
        """A fresh correctness network (weights drawn from torch's global generator)."""
        return _make_net(self.n_features_in_, self.n_experts_,
                         self.correctness_head or self.head, self.hidden_)

    def _fit_correctness(self, train: _Part, val: _Part, gen: torch.Generator, *,
                         net: nn.Module | None = None, progress: Any = None,
                         cancel: threading.Event | None = None, warn: bool = True) -> None:
        """Fit P(expert j right | x) on the known answers, IPS-weighted; Platt on validation.

        ``net`` is a network from :meth:`_correctness_net` (default: a new one),
        ``progress`` a running rich Progress to report in (default: its own) and
        ``cancel`` an event that stops training after the current epoch; ``warn=False``
        when the caller gave :meth:`_correctness_warnings` already. It reads
        ``train``, ``val`` and ``gen`` and writes only ``correctness_net_``,
        ``expert_platt_``, ``history_["correctness"]`` and ``calibration_["experts"]``, so
        it may run in a thread beside the classifier's training (and, with
        ``logistic_blend``, the ``correctness_linear_*`` and ``correctness_mix_`` arrays).
        """
        M = self.n_experts_
        net = self._correctness_net() if net is None else net
        self.correctness_net_ = net
        self.expert_platt_ = np.tile([1.0, 0.0], (M, 1))
        self._no_blend()
        if M == 0:
            return
        if warn:
            self._correctness_warnings(train, val)
        history = self._train_correctness(net, train, val, gen, progress=progress, cancel=cancel)
        if not train.known.any():
            return
        self.history_["correctness"] = history
        if self.logistic_blend:
            self._fit_blend(train, val)
        if self.calibrate:
            self._calibrate_correctness(val)

    def _train_correctness(self, net: nn.Module, train: _Part, val: _Part, gen: torch.Generator, *,
                           offsets: tuple[np.ndarray, np.ndarray] | None = None, progress: Any = None,
                           cancel: threading.Event | None = None, name: str = "expert correctness"
                           ) -> list:
        """Train a correctness network on the known answers (weighted log-loss); return its history.

        ``offsets``, (n_train, M) and (n_val, M) logits, are added to the network's output
        in training and validation (an offset in the sense of generalised linear models:
        McCullagh & Nelder, *Generalized Linear Models*, 2nd ed., 1989, sec. 6.2.5), so
        the network learns only where the answers depart from them. Without offsets the
        output bias starts at each expert's smoothed accuracy (rule of succession); with
        them, at 0.
        """
        M = self.n_experts_
        known = train.known
        right = (train.answers == train.y[:, None]) & known
        # start from each expert's smoothed accuracy (rule of succession), or from the offsets
        prior = np.full(M, 0.5) if offsets is not None else (right.sum(0) + 1.0) / (known.sum(0) + 2.0)
        with torch.no_grad():
            net[-1].bias.copy_(torch.from_numpy(_logit(prior).astype(np.float32)))
        rows = known.any(axis=1)
        if not rows.any():
            return []
        off_train, off_val = (np.zeros((train.X.shape[0], M)), np.zeros((val.X.shape[0], M))) \
            if offsets is None else offsets
        tensors = (self._std(train.X[rows]), torch.from_numpy(right[rows].astype(np.float32)),
                   torch.from_numpy(train.weights[rows].astype(np.float32)),
                   torch.from_numpy(off_train[rows].astype(np.float32)))
        v_known = val.known
        v_right = ((val.answers == val.y[:, None]) & v_known).astype(np.float32)
        Xv, v_off = self._std(val.X), torch.from_numpy(off_val.astype(np.float32))
        v_t, v_w = torch.from_numpy(v_right), torch.from_numpy(val.weights.astype(np.float32))
        settings = self._settings()
        settings.progress, settings.cancel = progress, cancel
        settings.convex = True  # weighted log-loss: a linear model goes to L-BFGS
        if not v_known.any():
            settings.max_epochs, settings.patience = min(20, settings.max_epochs), 10**9

        def loss_fn(m: nn.Module, xb: torch.Tensor, tb: torch.Tensor, wb: torch.Tensor, ob: torch.Tensor):
            bce = F.binary_cross_entropy_with_logits(m(xb) + ob, tb, reduction="none")
            return (wb * bce).sum() / (wb > 0).sum().clamp(min=1)

        def val_score(m: nn.Module) -> tuple[float, float]:
            if not v_known.any():  # nothing to score: any finite network will do
                return (0.0, 0.0) if bool(torch.isfinite(m(Xv)).all()) else (np.inf, np.inf)
            bce = F.binary_cross_entropy_with_logits(m(Xv) + v_off, v_t, reduction="none")
            return (float((v_w * bce).sum() / v_w.sum()), 0.0)

        return _train_loop(net, loss_fn, tensors, val_score, settings, gen, name)

    def _no_blend(self) -> None:
        """The network alone: zero logistic coefficients, network weight 1 per expert."""
        M, d = self.n_experts_, self.n_features_in_
        self.correctness_linear_coef_ = np.zeros((M, d))
        self.correctness_linear_intercept_ = np.zeros(M)
        self.correctness_mix_ = np.ones(M)

    def _fit_blend(self, train: _Part, val: _Part) -> None:
        """Per expert with fewer than ``BLEND_BELOW`` training answers: a logistic
        regression, mixed with the network by validation log-loss (:mod:`routeplan.blend`)."""
        counts = train.known.sum(axis=0)
        todo = [j for j in range(self.n_experts_) if 0 < counts[j] < blend.BLEND_BELOW]
        if not todo:
            return
        Xs, Xs_val = self._std_numpy(train.X), self._std_numpy(val.X)
        z_net = _forward(self.correctness_net_, val.X, self.x_mean_, self.x_scale_).astype(np.float64)
        for j in todo:
            k, v = train.known[:, j], val.known[:, j]
            coef, icpt = blend.fit_logistic(Xs[k], train.answers[k, j] == train.y[k], train.weights[k, j])
            self.correctness_linear_coef_[j], self.correctness_linear_intercept_[j] = coef, icpt
            self.correctness_mix_[j] = blend.choose_mix(
                z_net[v, j], Xs_val[v] @ coef + icpt, val.answers[v, j] == val.y[v], val.weights[v, j])

    def _std_numpy(self, X: np.ndarray) -> np.ndarray:
        """Standardised features (clipped as when scoring), float64."""
        return _standardised(np.asarray(X, dtype=np.float64), self.x_mean_, self.x_scale_)

    def _correctness_logits(self, X: np.ndarray, P: np.ndarray | None = None) -> np.ndarray:
        """Each expert's correctness logit before calibration, (n, M) float64: the network's,
        blended with the logistic regression where ``correctness_mix_`` is below 1.

        ``P``, the calibrated class probabilities of the rows, is for routers whose
        correctness model takes the class route as an offset (the plug-in router); here
        it is not used."""
        Z = _forward(self.correctness_net_, X, self.x_mean_, self.x_scale_).astype(np.float64)
        mix = self.correctness_mix_  # set by every fit and load (_no_blend at least)
        if np.all(mix == 1.0):
            return Z
        for s in range(0, X.shape[0], _CHUNK):
            part = blend.linear_logits(self._std_numpy(X[s:s + _CHUNK]), self.correctness_linear_coef_,
                                       self.correctness_linear_intercept_)
            Z[s:s + _CHUNK] = mix * Z[s:s + _CHUNK] + (1.0 - mix) * part
        return Z

    def _correctness_warnings(self, train: _Part, val: _Part) -> None:
        """Warn where the answers leave the correctness model without data."""
        known = train.known
        silent = np.flatnonzero(known.sum(0) == 0)
        if silent.size:
            warnings.warn(ExpertsWithoutAnswers(
                f"expert column(s) {', '.join(map(str, silent))} have no known answer in the "
                "training split; their correctness stays at the prior 0.5", silent.tolist()),
                stacklevel=4)
        if known.any() and not val.known.any():
            warnings.warn("no known answer in the validation split: the correctness model "
                          "trains for a fixed 20 epochs", stacklevel=4)

    def _calibrate_correctness(self, val: _Part, Z: np.ndarray | None = None) -> None:
        """Platt scaling per expert on the validation answers that are known.

        ``Z``: the validation rows' correctness logits, when they need more than ``val.X``
        (default :meth:`_correctness_logits` of ``val.X``); the report is written afresh."""
        Z = self._correctness_logits(val.X) if Z is None else Z
        report = self.calibration_["experts"] = []
        for j in range(self.n_experts_):
            k = val.known[:, j]
            t = (val.answers[k, j] == val.y[k]).astype(np.float64)
            a, b = cal.fit_platt(Z[k, j], t, val.weights[k, j],
                                  prior_strength=self.calibration_prior)
            self.expert_platt_[j] = (a, b)
            before = cal.expected_calibration_error(cal.apply_platt(Z[k, j], 1, 0), t)
            after = cal.expected_calibration_error(cal.apply_platt(Z[k, j], a, b), t)
            report.append({"expert": j, "n_known": int(k.sum()), "platt_a": a, "platt_b": b,
                           "ece_before": before, "ece_after": after})

    def _correct_proba(self, X: np.ndarray) -> np.ndarray:
        """Calibrated P(expert j right | x), (n, M) float64."""
        if self.n_experts_ == 0:
            return np.zeros((X.shape[0], 0))
        Z = self._correctness_logits(X)
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
                  "cost_matrix": self.cost_matrix_, "expert_platt": self.expert_platt_,
                  "correctness_linear.coef": self.correctness_linear_coef_,
                  "correctness_linear.intercept": self.correctness_linear_intercept_,
                  "correctness_mix": self.correctness_mix_}
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
        from routeplan.learner import router_from_arrays

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
        self._no_blend()  # format 1 (no blend arrays): the network alone
        if "correctness_mix" in arrays:
            self.correctness_linear_coef_ = np.asarray(arrays["correctness_linear.coef"], np.float64).reshape(M, d)
            self.correctness_linear_intercept_ = np.asarray(
                arrays["correctness_linear.intercept"], np.float64).reshape(M)
            self.correctness_mix_ = np.asarray(arrays["correctness_mix"], np.float64).reshape(M)


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
        Form of the networks: a ReLU MLP with layer widths ``hidden``, or linear. A
        linear map under a convex loss (the plug-in's classifier, every router's
        correctness model) is fitted to convergence by full-batch L-BFGS, as
        scikit-learn fits a logistic regression: ``max_epochs``, ``batch_size``,
        ``learning_rate`` and ``patience`` then do not apply to it and
        ``weight_decay / 2`` times the squared weights is its penalty. Linear scorers of
        the surrogate routers train by Adam with early stopping like the MLPs.
    hidden : tuple of int, optional
        Hidden layer widths of the MLP. Default: ``(64, 64, 64)`` when the training
        split has at least 5,000 cases, else ``(64, 64)``; the widths used are
        ``hidden_``. Measured: on the synthetic scenario (16,000 training cases, all
        answers) three layers cut the plug-in's gap to the Bayes cost from 0.013-0.014
        to 0.010-0.011 (seeds 0 and 1; widths 128 or 256 did not help), but on digits
        (about 1,000 training cases) they made the plug-in under-defer (k = 8: cost
        0.022 against 0.015 with two layers).
    correctness_head : {"mlp", "linear"}, optional
        Form of the correctness network; defaults to ``head``.
    logistic_blend : bool, default=False
        For each expert with fewer than 5,000 known training answers
        (:data:`routeplan.blend.BLEND_BELOW`), also fit an L2-penalised logistic
        regression of "answer right" on the features, and mix its logit with the
        network's by a weight chosen on the validation answers. The weights chosen are
        ``correctness_mix_`` (1: the network alone). Off by default: measured in
        :mod:`routeplan.blend`, it helped a little on a few hundred random answers of the
        synthetic scenario and not on digits or in rehearsal.
    max_epochs : int, default=200
        Upper bound on passes over the training split (per network).
    batch_size : int, default=512
        Rows per Adam step; on small data it shrinks so that an epoch has about 20
        steps (but at least 32 rows).
    learning_rate : float, default=1e-3
        Adam step size.
    weight_decay : float, default=1e-4
        Adam's L2 penalty (for a network fitted by L-BFGS, see ``head``).
    patience : int, default=15
        Epochs without a better validation score before training stops; the weights of
        the best epoch are kept.
    early_stopping : {"cost", "loss"} or None
        Validation score that picks the epoch of the classifier / scorer: the system
        cost of the routing (ties broken by the loss), or the loss (log-loss of the
        classifier, surrogate loss of the scorer; the scorer's ties broken by the cost). The
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
    calibration_prior : float, default=5.0
        Strength, in answers, of the prior that holds each expert's Platt / stacking map
        near the identity (:data:`routeplan.learner.CALIBRATION_PRIOR`, where the default is
        measured).
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

        Raises
        ------
        FloatingPointError
            If a network diverged: no epoch gave a finite validation score.
"""


def _init_common(self: _BaseRouter, kw: dict[str, Any]) -> None:
    """Store constructor arguments unchanged (scikit-learn convention)."""
    for k, v in kw.items():
        if k not in ("self", "__class__"):
            setattr(self, k, v)
