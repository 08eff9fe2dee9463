"""Error types that map to the command line's exit codes.

Exit codes (README, "Exit codes"):
  0  success
  2  bad input or usage: one clear line naming the file, row/column and what to do
  3  the fit finished but the convergence gate failed
  1  unexpected error (a bug: please report it with the traceback)
"""


class InputError(ValueError):
    """Bad input or usage. The message is one line shown to the user as is (exit 2)."""

    exit_code = 2


class ConvergenceGateError(RuntimeError):
    """A run did not pass the convergence gate (exit 3)."""

    exit_code = 3
