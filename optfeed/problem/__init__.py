"""Problem files: reading, checking, and the resolved :class:`Problem`."""

from .load import load_problem, problem_from_data
from .spec import Bound, Feed, Heat, Horizon, Objective, Oxygen, Problem, Species, Vessel

__all__ = [
    "load_problem", "problem_from_data", "Problem", "Species", "Feed", "Bound",
    "Vessel", "Oxygen", "Heat", "Horizon", "Objective",
]
