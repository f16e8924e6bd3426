"""Routers: learn, per case, whether the model decides or which expert the case goes to.

Every router has the same scikit-learn-style interface (``fit``, ``predict_costs``,
``predict_route``, ``predict_proba``, ``predict_expert_correct``, ``get_arrays``):

- :class:`PluginRouter` -- a classifier by cross-entropy plus a model of
  ``P(expert j right | x)`` per expert, deferring to the option of least expected cost
  after fees (post-hoc deferral: Narasimhan, Jitkrittum, Menon, Rawat & Kumar, "Post-hoc
  estimators for learning to defer to an expert", NeurIPS 2022). Given an imported
  class-probability matrix it learns the routing only (two-stage learning to defer:
  Mao, Mohri & Zhong, "Two-Stage Learning to Defer with Multiple Experts", NeurIPS 2023).
- :class:`EnsembleRouter` -- the average of several plug-in routers' calibrated
  estimates, routed the same way (a deep ensemble: Lakshminarayanan, Pritzel & Blundell,
  NeurIPS 2017); the preferred candidate of :func:`fit_candidates`.
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
setting afterwards. The routers live in :mod:`routeplan.plugin`,
:mod:`routeplan.ensemble` and :mod:`routeplan.joint`, their shared base in
:mod:`routeplan._routerbase`, the networks and the loop in :mod:`routeplan._nets`; this
module is their public face.

:func:`routeplan.selection.fit_candidates` fits several routers (:data:`CANDIDATES`) and
:func:`routeplan.selection.select_router` compares them on held-out cases by system cost
with intervals, beside the model alone and each expert alone; both are re-exported here.

Models are stored as plain arrays plus a JSON-able description (:meth:`get_arrays`,
:func:`router_from_arrays`); nothing is pickled.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from routeplan._routerbase import CALIBRATION_PRIOR, READABLE_FORMATS, _BaseRouter, realised_costs
from routeplan.ensemble import EnsembleRouter
from routeplan.joint import SurrogateRouter
from routeplan.plugin import PluginRouter

__all__ = [
    "CALIBRATION_PRIOR",
    "CANDIDATES",
    "DEFAULT_CANDIDATES",
    "EnsembleRouter",
    "PluginRouter",
    "SelectionResult",
    "SurrogateRouter",
    "TWO_STAGE_CANDIDATES",
    "fit_candidates",
    "realised_costs",
    "router_from_arrays",
    "select_router",
]


_ROUTERS: dict[str, type[Any]] = {"PluginRouter": PluginRouter,
                                  "SurrogateRouter": SurrogateRouter,
                                  "EnsembleRouter": EnsembleRouter}


def router_from_arrays(arrays: Mapping[str, np.ndarray], meta: Mapping[str, Any]
                       ) -> _BaseRouter | EnsembleRouter:
    """Rebuild a fitted router from :meth:`get_arrays` output (no code is loaded).

    Parameters
    ----------
    arrays : mapping of str to ndarray
    meta : mapping
        The JSON-able description returned beside the arrays.

    Returns
    -------
    PluginRouter, SurrogateRouter or EnsembleRouter
    """
    if int(meta.get("format_version", -1)) not in READABLE_FORMATS:
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
CANDIDATES: dict[str, tuple[type[Any], dict[str, Any]]] = {
    "plugin-ensemble": (EnsembleRouter, {"head": "mlp"}),
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
#: :func:`routeplan.selection.select_router`). The averaged plug-in router comes first: of
#: the routers measured it alone came within 0.01 of the Bayes-optimal cost on the
#: synthetic scenario (:class:`EnsembleRouter`); its first member is the ``"plugin"``
#: candidate, so the pair costs ``n_members`` plug-in fits, not one more.
DEFAULT_CANDIDATES = ("plugin-ensemble", "plugin", "asym-mlp", "softmax-mlp", "ova-mlp")
#: Candidates fitted by default in two-stage mode (imported class probabilities), where
#: only plug-in routers apply.
TWO_STAGE_CANDIDATES = ("plugin-ensemble", "plugin")


def __getattr__(name: str) -> Any:
    """Re-export the selection functions lazily (routeplan.selection imports this module)."""
    if name in ("SelectionResult", "fit_candidates", "select_router"):
        from routeplan import selection

        return getattr(selection, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
