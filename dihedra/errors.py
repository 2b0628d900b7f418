"""The one exceptions module of dihedra.

A :class:`DihedraError` is a user error: one clear sentence with the value received and what to do
instead. The command line prints it without a traceback and exits with status 2. The helpers at the
end raise them with one wording wherever dihedra checks a choice or reads a TOML file.
"""

import tomllib


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


def name_list(names, limit):
    """The first ``limit`` of ``names`` joined by commas, and how many more there are.

    >>> name_list(["a", "b", "c"], 2), name_list(["a"], 2)
    ('a, b and 1 more', 'a')
    """
    names = list(names)
    return ", ".join(names[:limit]) + (f" and {len(names) - limit} more" if len(names) > limit else "")


def one_of(name, value, valid):
    """Raise a :class:`DihedraError` unless ``value`` is one of ``valid``.

    One shared helper, so that every "must be one of" message reads the same.
    """
    if value not in valid:
        listed = ", ".join(repr(v) for v in valid)
        raise DihedraError(f"{name} must be one of {listed}; got {value!r}.")
    return value


def read_toml(path, what, error=InputFileError, with_text=False):
    """The tables of the TOML file ``path``, or ``error`` naming it as ``what`` (``"scheme file"``)
    when it cannot be read or is not TOML (TOML files are UTF-8: other bytes are an error too).

    With ``with_text``, ``(tables, text)``.
    """
    try:
        with open(path, "rb") as fh:
            raw = fh.read()
    except OSError as exc:
        raise error(f"cannot read the {what} {path}: {exc.strerror}.") from None
    try:
        text = raw.decode("utf-8")
        data = tomllib.loads(text)
    except (UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise error(f"the {what} {path} is not valid TOML: {exc}.") from None
    return (data, text) if with_text else data
