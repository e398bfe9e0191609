"""Calibrating a problem's parameters against past runs (``optfeed fit``).

* :mod:`.runs` reads and checks a runs file and its data;
* :mod:`.transcription` is the calibration NLP (collocation blocks per run, sharing
  the estimated parameters);
* :mod:`.simulate` re-simulates runs with their sample volumes;
* :mod:`.statistics` turns residuals and sensitivities into intervals and verdicts;
* :mod:`.job` is the job, :func:`fit`.
"""

from .job import FitResult, fit
from .runs import Runs, load_runs

__all__ = ["fit", "FitResult", "load_runs", "Runs"]
