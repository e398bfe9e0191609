"""optfeed: feed profiles for fed-batch cultures, checked against the vessel's limits.

Python API (mirrors the command line):

* :func:`load_problem` - read and check a problem file;
* :func:`check` - simulate a proposed schedule and judge every limit;
* :func:`recipe` - a run's schedule as pump setpoints, checked again.
"""

__version__ = "0.1.0"

from .check import CheckResult, check  # noqa: E402
from .errors import InputError, OptfeedError, SimulationError  # noqa: E402
from .problem import Problem, load_problem  # noqa: E402
from .recipe import RecipeResult, recipe  # noqa: E402
from .schedule import Schedule, load_schedule  # noqa: E402

__all__ = [
    "__version__", "load_problem", "check", "CheckResult", "Problem", "Schedule",
    "load_schedule", "InputError", "OptfeedError", "SimulationError", "recipe", "RecipeResult",
]
