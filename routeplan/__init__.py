"""routeplan: plan expert labelling rounds, learn when a model should defer, freeze a routing policy.

The command line (``routeplan``) is a thin layer over this library. Importing the package is
cheap: modules that need numpy, pandas or torch are imported where they are used.
"""

__version__ = "0.1.0"

__all__ = ["__version__"]
