"""Sweeps: many variants of a problem, run unattended, resumable, locally or on Dask.

* :mod:`.spec` reads a sweep file and expands it into cases;
* :mod:`.store` is the SQLite store (one row per case);
* :mod:`.runner` runs cases (a process each, with a time limit; or on Dask);
* :mod:`.run` is the job, :func:`run_sweep`;
* :mod:`.outputs` writes the summary CSV and figures.
"""

from .run import SweepResult, run_sweep
from .spec import Case, Sweep, load_sweep

__all__ = ["run_sweep", "load_sweep", "SweepResult", "Sweep", "Case"]
