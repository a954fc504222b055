"""towers: train two-tower embedding models on a laptop CPU, from interaction logs and feature tables."""

from towers.api import Run, load, train
from towers.errors import TowersError

__all__ = ["Run", "TowersError", "load", "train"]
__version__ = "0.1.0"
