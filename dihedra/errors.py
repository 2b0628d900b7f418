"""The one exceptions module of dihedra.

A :class:`DihedraError` is a user error: one clear sentence with the value received and what to do
instead. The command line prints it without a traceback and exits with status 2.
"""


class DihedraError(Exception):
    """A problem with the user's input that the user can fix."""


class InputFileError(DihedraError):
    """A file is missing, unreadable, inconsistent or truncated."""


class SelectionError(DihedraError):
    """A torsion specification does not select valid torsions."""


class SchemeError(DihedraError):
    """A state scheme is unknown or malformed."""


class OutputExistsError(DihedraError):
    """The output folder exists and --overwrite was not given."""


class OutputWriteError(OSError):
    """Writing results failed during the trajectory pass (a full disk, a lost mount): an error of
    the output, raised as such (an ``OSError`` while reading means a damaged trajectory)."""


def one_of(name, value, valid):
    """Raise a :class:`DihedraError` unless ``value`` is one of ``valid``.

    One shared helper, so that every "must be one of" message reads the same.
    """
    if value not in valid:
        listed = ", ".join(repr(v) for v in valid)
        raise DihedraError(f"{name} must be one of {listed}; got {value!r}.")
    return value
