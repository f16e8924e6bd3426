"""routeplan: plan expert labelling rounds, learn when a model should defer, freeze a routing policy.

The command line (``routeplan``) is a thin layer over this library. Importing the package is
cheap: the names below are loaded from their modules on first use, so ``routeplan --help``
never imports numpy, pandas or torch.

Examples
--------
>>> import routeplan
>>> routeplan.__version__
'0.1.0'
"""

from __future__ import annotations

import importlib
from typing import Any

__version__ = "0.1.0"

_EXPORTS = {
    "Workspace": "routeplan.workspace",
    "InputError": "routeplan.errors",
    "load_pool": "routeplan.pool",
    "fit_workspace": "routeplan.fitting",
    "PluginRouter": "routeplan.learner",
    "SurrogateRouter": "routeplan.learner",
    "fit_candidates": "routeplan.selection",
    "select_router": "routeplan.selection",
    "plan_round": "routeplan.rounds",
    "competence_report": "routeplan.competence",
    "freeze_workspace": "routeplan.freezing",
    "route_frame": "routeplan.deploy",
    "read_policy": "routeplan.policy",
    "make_scenario": "routeplan.simulate",
}

__all__ = ["__version__", *_EXPORTS]


def __getattr__(name: str) -> Any:
    """Load a public name from its module on first use (PEP 562)."""
    if name in _EXPORTS:
        return getattr(importlib.import_module(_EXPORTS[name]), name)
    raise AttributeError(f"module 'routeplan' has no attribute {name!r}")
