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


# A suggestion is offered only for a near miss: difflib's similarity ratio 2M/T of at least 0.75 keeps
# one-letter slips and swaps of words of four letters or more ("tolerence", "uint", "nmae") and drops
# chance overlaps ("type" and "step" score 0.5). Common practice, no source.
CLOSE_MATCH = 0.75


def nearest(word: str, valid, label: str = "valid keys", otherwise: str | None = None) -> str:
    """Hint for an unknown ``word``: "did you mean 'x'?" for a close match, else the valid choices.

    ``otherwise`` replaces the list of choices (for long lists such as run ids): the hint is then only
    "did you mean 'x'?" for a close match, else ``otherwise``.
    """
    import difflib

    valid = [str(v) for v in valid]
    close = difflib.get_close_matches(str(word), valid, n=1, cutoff=CLOSE_MATCH)
    if otherwise is not None:
        return f"did you mean '{close[0]}'?" if close else otherwise
    if close:
        return f"did you mean '{close[0]}'? ({label}: {', '.join(valid)})"
    return f"{label}: {', '.join(valid)}"
