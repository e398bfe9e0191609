"""optfeed: feed profiles for fed-batch cultures, checked against the vessel's limits.

Python API (mirrors the command line; each job returns a result object):

* :func:`load_problem` - read and check a problem file;
* :func:`validate` - read and check a problem (and a schedule), solve nothing;
* :func:`check` - simulate a proposed schedule and judge every limit;
* :func:`optimize` - the best feed profile inside every limit, verified;
* :func:`sweep` - many variants of a problem, unattended and resumable;
* :func:`recipe` - a run's schedule as pump setpoints, checked again;
* :func:`fit` - the parameters a runs file names, calibrated against past runs.

Every job takes ``set={"parameters.mu_max": "0.5 1/h", ...}`` to change values by
dotted path, as sweep files do. Example::

    import optfeed
    r = optfeed.optimize("configs/inhibited_product.yaml", set={"solver.starts": 2})
    r.status, r.objective_sim, r.objective_unit
    table = r.trajectory_table()     # {'time [h]': array, 'X [g/L]': array, ...}

The job modules stay importable as before (``from optfeed.optimize import
optimize, OptimizeResult``, ``from optfeed.fit import fit, load_runs``; the fit job
is a package, ``optfeed/fit/``); at the top level the names are the functions.
"""

import os as _os

# One BLAS thread per process. CasADi's OpenBLAS (and numpy's) start a thread pool whose
# idle threads spin: on an 8-scenario NLP they doubled the CPU an iteration costs without
# making it faster (measured: 627 -> 347 ms CPU per iteration, the same wall time; the
# whole robust demo 206 -> 147 s CPU), and they steal the cores that optfeed's own worker
# processes (starts, sweep cases, Monte Carlo) run on. Set before CasADi is loaded; a
# value the user set wins.
_os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")


__version__ = "0.1.0"

# The job functions share their names with the modules that hold them
# (optfeed/optimize.py, optfeed/check.py, optfeed/validate.py, optfeed/sweep/, optfeed/fit/):
# each module is imported first, then its function takes the name here.
from .errors import InputError, OptfeedError, SimulationError  # noqa: E402
from .problem import Problem, load_problem  # noqa: E402
from .schedule import Schedule, load_schedule, piecewise_constant  # noqa: E402
from .validate import ValidateResult, validate  # noqa: E402
from .check import CheckResult, check  # noqa: E402
from .montecarlo import MonteCarloResult  # noqa: E402
from .optimize import OptimizeResult, optimize  # noqa: E402
from .sweep import SweepResult, load_sweep, run_sweep  # noqa: E402
from .recipe import RecipeResult, recipe  # noqa: E402
from .fit import FitResult, fit  # noqa: E402  (the package optfeed.fit stays in sys.modules)

sweep = run_sweep  # the sweep job under the name of the command

__all__ = [
    "__version__", "load_problem", "validate", "check", "optimize", "sweep", "run_sweep", "load_sweep",
    "ValidateResult", "CheckResult", "OptimizeResult", "SweepResult", "Problem", "Schedule",
    "load_schedule", "piecewise_constant", "InputError", "OptfeedError", "SimulationError", "recipe",
    "RecipeResult", "MonteCarloResult", "fit", "FitResult",
]
