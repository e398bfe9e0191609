"""Status words and exit codes: the one table every job uses.

Exit codes: 0 success (within limits / optimal and verified), 1 a limit broken or
an answer that is not a verified optimum (including an infeasible problem), 2 bad
input, 3 a solver or integrator failure.

An answer is only ever called optimal when the solver converged *and* the
re-simulation of its pump schedule confirmed the objective and the limits.
"""

VALID = "valid"

WITHIN_LIMITS = "within limits"
LIMIT_BROKEN = "limit broken"
SIMULATION_FAILED = "simulation failed"

OPTIMAL_VERIFIED = "optimal, verified"
CONVERGED_NOT_VERIFIED = "converged, not verified"
INFEASIBLE = "infeasible"
ITERATION_LIMIT = "iteration limit"
TIME_LIMIT = "time limit"
FAILED = "failed"

FITTED = "fitted"  # fit: the re-simulated weighted least squares at a stationary point
NOT_CONVERGED = "not converged"  # fit: no start answered, or the polish did not settle

EXIT_OK = 0
EXIT_NOT_OK = 1
EXIT_BAD_INPUT = 2
EXIT_FAILED = 3
EXIT_INTERRUPTED = 130

EXIT_CODES = {
    VALID: EXIT_OK,
    WITHIN_LIMITS: EXIT_OK,
    LIMIT_BROKEN: EXIT_NOT_OK,
    SIMULATION_FAILED: EXIT_FAILED,
    OPTIMAL_VERIFIED: EXIT_OK,
    CONVERGED_NOT_VERIFIED: EXIT_NOT_OK,
    INFEASIBLE: EXIT_NOT_OK,
    ITERATION_LIMIT: EXIT_NOT_OK,
    TIME_LIMIT: EXIT_NOT_OK,
    FAILED: EXIT_FAILED,
    FITTED: EXIT_OK,
    NOT_CONVERGED: EXIT_NOT_OK,
}


def exit_code(status: str) -> int:
    """Exit code for a status word."""
    return EXIT_CODES[status]
