"""Tables and JSON documents of a results folder: the one table writer and reader of dihedra.

Every table is written by :func:`write_table` (CSV through Apache Arrow's writer: ``to_csv``
formats every cell in Python-level loops, about 6 s per million rows, and profiles of 15,000
torsions are 6.5 million rows), atomically and only over a file that dihedra wrote
(:func:`dihedra.io.outputs.write_file`). Floating-point values are written in their shortest
round-trip form: exactly (double precision) in tables of up to :data:`EXACT_ROWS` rows, which then
read back equal to the DataFrame, and in single precision (at least 7 significant digits) in longer
tables such as the profiles of thousands of torsions; NaN as an empty cell, infinity as ``inf``,
booleans as ``true``/``false`` (read back as booleans by pandas, R and spreadsheets), strings
without quotes unless a value needs them. Every table reads back with a plain
``pandas.read_csv(path)``.

Example
-------
>>> import os, tempfile
>>> import pandas as pd
>>> from dihedra.io.tables import write_table
>>> tmp = tempfile.TemporaryDirectory()
>>> path = write_table(pd.DataFrame({"angle_deg": [-177.5, 0.1], "sampled": [True, False]}), tmp.name, "t.csv")
>>> open(path).read().splitlines()
['angle_deg,sampled', '-177.5,true', '0.1,false']
>>> tmp.cleanup()
"""

from __future__ import annotations

import json
import os

import numpy as np
import pandas as pd

from ..errors import InputFileError
from .outputs import write_file

#: Tables with at most this many rows are written with every digit of their double-precision
#: values (they read back equal); longer tables (profiles of thousands of torsions, millions of
#: rows) in single precision, about half the text and time.
EXACT_ROWS = 100_000
#: Largest magnitude written in single precision (beyond it a column keeps double precision).
_FLOAT32_SAFE = 1e37
#: Rows formatted per Arrow call (bounds the memory of the text buffer).
_ROWS_PER_PART = 10_000


def _categories(dtype):
    """The categories of a categorical column as Arrow strings (made once per table: a column of
    15,000 torsion labels took 10 ms for every part of 10,000 rows)."""
    import pyarrow as pa

    return pa.array([str(c) for c in dtype.categories], type=pa.string())


def _arrow_column(series, single, categories=None):
    import pyarrow as pa

    dtype = series.dtype
    if isinstance(dtype, pd.CategoricalDtype):
        codes = series.cat.codes.to_numpy()
        return pa.DictionaryArray.from_arrays(pa.array(codes, mask=codes < 0),
                                              _categories(dtype) if categories is None else categories)
    if isinstance(dtype, np.dtype) and dtype.kind == "f":
        values = series.to_numpy()
        finite = np.isfinite(values)
        if single and (not finite.any() or np.abs(values[finite]).max() < _FLOAT32_SAFE):
            values = values.astype(np.float32)
        return pa.array(values, mask=np.isnan(values))
    if isinstance(dtype, np.dtype) and dtype.kind in "biu":
        return pa.array(series.to_numpy())
    try:
        return pa.array(series, from_pandas=True)
    except (pa.ArrowInvalid, pa.ArrowTypeError):  # mixed objects: their text
        return pa.array(series.astype(str), from_pandas=True)


def write_csv(frame, path, threads=None):
    """Write ``frame`` (no index) as CSV to ``path`` directly (no checks; see :func:`write_table`).

    Parameters
    ----------
    frame : DataFrame
    path : str
    threads : int, optional
        Parts of the table formatted side by side (default: the number of cores, at most 4);
        they are written in order.

    Returns
    -------
    str
        ``path``.
    """
    from collections import deque
    from concurrent.futures import ThreadPoolExecutor

    threads = threads or min(4, os.cpu_count() or 1)
    header = ",".join(_quote(str(c)) for c in frame.columns) + "\n"
    starts = range(0, len(frame), _ROWS_PER_PART)
    single = len(frame) > EXACT_ROWS
    categories = {c: _categories(frame[c].dtype) for c in frame.columns
                  if isinstance(frame[c].dtype, pd.CategoricalDtype)}
    with open(path, "wb") as fh, ThreadPoolExecutor(threads) as pool:
        fh.write(header.encode())
        pending = deque()
        for start in starts:
            pending.append(pool.submit(_format_part, frame.iloc[start:start + _ROWS_PER_PART], single, categories))
            if len(pending) >= threads:   # (at most one part per thread in memory)
                fh.write(pending.popleft().result())
        while pending:
            fh.write(pending.popleft().result())
    import pyarrow as pa

    pa.default_memory_pool().release_unused()   # (Arrow's pool keeps what formatting took otherwise)
    return path


def _format_part(part, single, categories=None):
    """CSV text (no header) of some rows, as a buffer (``categories``: those of the categorical
    columns, by name, as Arrow strings)."""
    import pyarrow as pa
    import pyarrow.csv as pacsv

    categories = categories or {}
    table = pa.table({f"c{k}": _arrow_column(part[c], single, categories.get(c)) for k, c in enumerate(part.columns)})
    for quoting in ("none", "needed"):  # "none" refuses values with a comma, quote or line break
        sink = pa.BufferOutputStream()
        try:
            pacsv.write_csv(table, sink, pacsv.WriteOptions(include_header=False, quoting_style=quoting))
        except pa.ArrowInvalid:
            continue
        return memoryview(sink.getvalue())
    raise ValueError("the table could not be written as CSV")  # pragma: no cover - "needed" always works


def _quote(text):
    return '"' + text.replace('"', '""') + '"' if any(ch in text for ch in ',"\n\r') else text


def write_table(frame, folder, name):
    """Write a tidy table as ``folder/name`` (CSV, no index; see the module notes); returns the
    path."""
    return write_file(folder, name, lambda tmp: write_csv(frame, tmp))


def write_json(data, folder, name):
    """Write a JSON document as ``folder/name`` (NumPy values converted); returns the path."""
    def write(tmp):
        with open(tmp, "w", encoding="utf-8") as fh:
            json.dump(data, fh, indent=2, default=_json_default)
            fh.write("\n")
    return write_file(folder, name, write)


def json_ready(obj):
    """``obj`` (dicts, lists, tuples, numbers) with non-finite floats as ``None`` (JSON null),
    NumPy scalars as Python numbers and keys as strings, ready for :func:`write_json`."""
    if isinstance(obj, dict):
        return {str(k): json_ready(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [json_ready(v) for v in obj]
    if isinstance(obj, (float, np.floating)):
        return None if not np.isfinite(obj) else float(obj)
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.bool_):
        return bool(obj)
    return obj


def _json_default(obj):
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.floating):
        return float(obj)
    if isinstance(obj, np.bool_):
        return bool(obj)
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    return str(obj)


#: Tables made of groups of equal length (per key, within each value of a stratum column): one
#: row per bin of each profile. A table cut short at a line boundary leaves its last group
#: shorter. (The population tables, whose torsions may have different numbers of states, are
#: checked against the block sums by :func:`dihedra.io.resultsdir.load_results`.)
EQUAL_GROUPS = {
    "profiles.csv": (("type", "torsion", "estimate"), "estimate"),
    "comparison_profiles.csv": (("type",), None),
}


#: Columns that hold names: read as text whatever their first rows hold (``torsion`` is empty in
#: the rows of a type and a label in those of a torsion; pandas would otherwise guess per chunk,
#: with a warning, on large files).
TEXT_COLUMNS = {c: str for c in ("torsion", "type", "state", "group", "group_type", "conformer", "name",
                                    "from_state", "to_state", "reference_state", "scheme")}


def read_table(folder, name, columns=()):
    """A table of a results folder as a DataFrame (empty cells as NaN, text kept as text).

    Raises :class:`~dihedra.errors.InputFileError` (one sentence) when the file is missing, is
    not a readable table, lacks one of ``columns``, or is cut short: its last line unfinished
    (every table dihedra writes ends with a line break), or, for the tables of
    :data:`EQUAL_GROUPS`, a group shorter than the others."""
    path = os.path.join(os.fspath(folder), name)
    if not os.path.exists(path):
        raise InputFileError(f"{folder} has no {name}.")
    damaged = "the results folder is damaged: run the step that writes it again."
    try:
        with open(path, "rb") as fh:
            fh.seek(0, os.SEEK_END)
            if fh.tell():
                fh.seek(-1, os.SEEK_END)
                if fh.read(1) != b"\n":
                    raise InputFileError(f"{path} is cut short (its last line is unfinished); {damaged}")
        frame = pd.read_csv(path, keep_default_na=False, na_values=[""], dtype=TEXT_COLUMNS)
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError, OSError) as exc:
        raise InputFileError(f"{path} is not a readable table ({str(exc).strip().splitlines()[0]}); "
                             f"{damaged}") from None
    missing = [c for c in columns if c not in frame.columns]
    if missing:
        raise InputFileError(f"{path} lacks the column(s) {', '.join(missing)}; the results folder is damaged "
                             "or from another program: run the step that writes it again.")
    _check_groups(frame, path, os.path.basename(name), damaged)
    return frame


def _check_groups(frame, path, name, damaged):
    """Refuse a table of :data:`EQUAL_GROUPS` whose groups differ in length."""
    keys, stratum = EQUAL_GROUPS.get(name, ((), None))
    if not keys or not all(k in frame.columns for k in keys) or frame.empty:
        return
    sizes = frame.groupby(list(keys), sort=False, dropna=False).size()
    strata = sizes.groupby(level=stratum, dropna=False) if stratum else [(None, sizes)]
    for _, part in strata:
        if part.nunique() > 1:
            short = part.idxmin()
            raise InputFileError(f"{path} is cut short or mixed: group {short} has {int(part.min())} rows where the "
                                 f"others have {int(part.max())}; {damaged}")


def read_optional_table(folder, name, columns=()):
    """:func:`read_table`, or ``None`` when the folder has no such file."""
    if not os.path.exists(os.path.join(os.fspath(folder), name)):
        return None
    return read_table(folder, name, columns)


def read_json(folder, name):
    """A JSON document of a results folder (an :class:`InputFileError` if missing or damaged)."""
    path = os.path.join(os.fspath(folder), name)
    try:
        with open(path, encoding="utf-8") as fh:
            return json.load(fh)
    except FileNotFoundError:
        raise InputFileError(f"{folder} has no {name}.") from None
    except (ValueError, OSError) as exc:
        raise InputFileError(f"{path} is damaged ({exc}); run the step that writes it again.") from None


def read_optional_json(folder, name):
    """:func:`read_json`, or ``None`` when the folder has no such file."""
    if not os.path.exists(os.path.join(os.fspath(folder), name)):
        return None
    return read_json(folder, name)


def matching_files(folder, pattern):
    """The names of the files of a results folder that match a shell pattern (``couplings_*.csv``), sorted."""
    import fnmatch

    try:
        names = os.listdir(os.fspath(folder))
    except OSError:
        return []
    return sorted(n for n in names if fnmatch.fnmatch(n, pattern) and os.path.isfile(os.path.join(folder, n)))


def read_optional_text(folder, name):
    """A text file of a results folder (``analysis.toml``), or ``None`` when the folder has none."""
    path = os.path.join(os.fspath(folder), name)
    if not os.path.exists(path):
        return None
    try:
        with open(path, encoding="utf-8") as fh:
            return fh.read()
    except (OSError, UnicodeDecodeError) as exc:
        raise InputFileError(f"{path} cannot be read ({exc}).") from None
