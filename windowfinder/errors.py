"""The one user-facing error type.

Bad input (a malformed study file, a wrong column, a duplicate run id ...) raises :class:`InputError`
with a single line that names the file, row or key, says what is wrong and what to do. The command line
prints that line and exits with :data:`InputError.exit_code` (2); nothing is written.
"""

from __future__ import annotations


class InputError(Exception):
    """Bad user input: one clear line, exit code 2, no traceback."""

    exit_code = 2

    def __init__(self, message: str):
        # One line only: the CLI prints it as is.
        super().__init__(" ".join(str(message).split()))

    @property
    def message(self) -> str:
        return str(self)
