"""``python -m routeplan``."""

from .cli import main

main()
