"""The project's exception and warning types."""

from __future__ import annotations


class InputError(ValueError):
    """Bad input from a user (file, option, config key): reported as one line, exit code 2.

    The message names what is wrong and where (file, row/date, column, option or key).
    """


class ConvergenceWarning(UserWarning):
    """An estimator stopped before meeting its convergence criterion."""
