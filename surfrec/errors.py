"""Exception types shared by every stage.

The command line turns :class:`InputError` into one line on stderr and exit
status 2; :class:`ProcessingError` into exit status 1; :class:`CheckFailed`
into exit status 3. Library users catch them like any ``ValueError`` /
``RuntimeError``.
"""


class InputError(ValueError):
    """Bad input from the user: a file, an option value or a combination of them.

    The message is one sentence that names the offending input and, where it
    helps, what was expected.
    """


class ProcessingError(RuntimeError):
    """A failure while processing valid input (numerical breakdown, disk full...)."""


class CheckFailed(RuntimeError):
    """A check that ran to the end and found a problem (exit status 3)."""
