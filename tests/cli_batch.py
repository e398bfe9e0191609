"""Run many ``optfeed`` command lines in one Python process (for the bad-input corpus).

Reads a JSON list of jobs ``{"argv": [...], "cwd": "..."}`` from stdin and writes a JSON
list of ``[exit code, stdout, stderr]`` to the file named by its first argument. Each
command runs through ``optfeed.cli.main`` as the console script does, with stdout and
stderr captured; an exception that escapes is printed as the interpreter would print
it (a traceback on stderr) with exit code 1, so a test sees it as it would from a
separate process. One interpreter start instead of two per case: the corpus takes
seconds, not minutes.
"""

from __future__ import annotations

import contextlib
import io
import json
import os
import sys
import traceback

from optfeed.cli import main


def run(argv, cwd) -> list:
    os.chdir(cwd)
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        try:
            code = main(argv)
        except SystemExit as exc:  # argparse and explicit exits
            code = exc.code if isinstance(exc.code, int) else (0 if exc.code is None else 1)
        except BaseException:  # noqa: BLE001 - reported as a separate process would report it
            traceback.print_exc()
            code = 1
    return [code, out.getvalue(), err.getvalue()]


if __name__ == "__main__":
    jobs = json.load(sys.stdin)
    results = [run(job["argv"], job["cwd"]) for job in jobs]
    with open(sys.argv[1], "w", encoding="utf-8") as fh:
        json.dump(results, fh)
