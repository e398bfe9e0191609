"""Status words and exit codes: the one table every job uses.

Exit codes: 0 success (within limits / optimal and verified), 1 a limit broken or
an answer that is not a verified optimum, 2 bad input, 3 a solver or integrator
failure.
"""

WITHIN_LIMITS = "within limits"
LIMIT_BROKEN = "limit broken"
SIMULATION_FAILED = "simulation failed"

EXIT_OK = 0
EXIT_NOT_OK = 1
EXIT_BAD_INPUT = 2
EXIT_FAILED = 3

EXIT_CODES = {
    WITHIN_LIMITS: EXIT_OK,
    LIMIT_BROKEN: EXIT_NOT_OK,
    SIMULATION_FAILED: EXIT_FAILED,
}


def exit_code(status: str) -> int:
    """Exit code for a status word."""
    return EXIT_CODES[status]
