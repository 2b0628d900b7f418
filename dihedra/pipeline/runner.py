"""Reading, checking and running an analysis file (see :mod:`dihedra.pipeline`)."""

from __future__ import annotations

import contextlib
import difflib
import hashlib
import math
import os
import time
import tomllib
from dataclasses import dataclass, field

from .._version import __version__
from ..errors import DihedraError, read_toml
from ..io.outputs import check_folder_target, read_marker, write_text
from ..io.resultsdir import load_results
from ..io.tables import write_json
from .checks import check_values
from .named_types import check_named_types
from .steps import STEP_ORDER, STEPS

#: Top-level keys of an analysis file.
TOP_LEVEL_KEYS = ("base_dir", "out", "steps")
#: Name of the copy of the analysis file in the results folder, and of the run record.
COPY_NAME = "analysis.toml"
RECORD_NAME = "analysis.json"


@dataclass
class Step:
    """One step: its definition, the arguments of its API call, and where it came from."""

    name: str
    arguments: dict
    where: str

    @property
    def spec(self):
        return STEPS[self.name]

    def call(self):
        """The API call as text (for --dry-run and the record)."""
        given = [f"{k}={v!r}" for k, v in self.arguments.items()]
        head = [] if self.spec.creates_folder or self.name == "scan" else ["result"]
        return f"{self.spec.call}({', '.join(head + given)})"


@dataclass
class Pipeline:
    """An analysis file, checked and turned into steps."""

    path: str
    base_dir: str
    out: str
    steps: list
    text: str
    overwrite: bool = False
    notes: list = field(default_factory=list)


class _Context:
    """What the steps share: the results folder, whether it may be replaced, the log, the result."""

    def __init__(self, pipe, log):
        self.out, self.overwrite, self.log = pipe.out, pipe.overwrite, log
        self._result = None
        # the files the folder held before this run (an analysis replaces those only with --overwrite)
        marker = None if any(st.spec.creates_folder for st in pipe.steps) else read_marker(pipe.out)
        self.before = set(marker["files"]) if marker else set()

    def result(self):
        if self._result is None:
            self._result = load_results(self.out)
        return self._result

    def forget(self):
        self._result = None


# ----------------------------------------------------------------------------------------------
# Reading and checking
# ----------------------------------------------------------------------------------------------

def _load_toml(path):
    return read_toml(path, "analysis file", with_text=True)


def _suggest(key, valid):
    close = difflib.get_close_matches(key, valid, n=1)
    return f" (did you mean {close[0]!r}?)" if close else ""


def _resolve(key, value, spec, base_dir, where):
    """A value with its paths made absolute (relative to ``base_dir``); a missing input file is an
    error here, before any step runs."""
    if key in spec.paths:
        items = value if isinstance(value, list) else [value]
        if not all(isinstance(v, str) and v for v in items):
            raise DihedraError(f"{where}: key {key!r} takes a file name" + ("s" if isinstance(value, list) else "")
                               + f"; got {value!r}.")
        done = [_path(v, base_dir) for v in items]
        if key not in ("out",):
            for original, path in zip(items, done):
                plain = path.rsplit(":", 1)[0] if key == "weights" and not os.path.exists(path) else path
                if not os.path.exists(plain):
                    raise DihedraError(f"{where}: {key} {original!r} does not exist ({plain}).")
        return done if isinstance(value, list) else done[0]
    if key in spec.specs:
        items = value if isinstance(value, list) else [value]
        done = [_path(v, base_dir) if isinstance(v, str) and v.lower().endswith(".toml") else v for v in items]
        for original, path in zip(items, done):
            if path is not original and not os.path.exists(path):
                raise DihedraError(f"{where}: {key} file {original!r} does not exist ({path}).")
        return done if isinstance(value, list) else done[0]
    return value


def _path(value, base_dir):
    value = os.path.expanduser(value)
    return value if os.path.isabs(value) else os.path.normpath(os.path.join(base_dir, value))


def _check_type(key, value, default, where):
    """A value of the kind the API's default has (a switch, a number, a text)."""
    if isinstance(default, bool):
        if not isinstance(value, bool):
            raise DihedraError(f"{where}: key {key!r} is a switch: give true or false; got {value!r}.")
    elif isinstance(default, (int, float)) and default is not None:
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
            raise DihedraError(f"{where}: key {key!r} takes a number; got {value!r}.")
    elif isinstance(default, str) and not isinstance(value, (str, list)):
        raise DihedraError(f"{where}: key {key!r} takes a text; got {value!r}.")


def table_arguments(name, table, base_dir, where):
    """The API arguments of step ``name`` from its table; unknown keys, wrong types and missing
    input files are errors naming the key and the table."""
    spec = STEPS[name]
    arguments = {}
    for raw_key in table:   # every key first: a misspelt key is named before any other problem
        key = str(raw_key).replace("-", "_")
        if key not in spec.keys:
            owned = "out" if spec.creates_folder else None
            if key == owned or key in ("result", "folder"):
                raise DihedraError(f"{where}: key {raw_key!r} is set by the pipeline from the top-level 'out'; "
                                   "remove it from the table.")
            raise DihedraError(f"{where}: unknown key {raw_key!r}{_suggest(key, spec.keys)}; valid keys are "
                               f"{', '.join(sorted(spec.keys))}.")
    for raw_key, value in table.items():
        key = str(raw_key).replace("-", "_")
        _check_type(key, value, spec.defaults.get(key), where)
        arguments[key] = _resolve(key, value, spec, base_dir, where)
    missing = [k for k in spec.required if k not in arguments]
    if missing:
        raise DihedraError(f"{where}: the table needs {', '.join(missing)}.")
    if name == "compare" and "scan" not in arguments and "reference_populations" not in arguments:
        raise DihedraError(f"{where}: give scan = \"FILE\", reference_populations = \"FILE\", or both.")
    check_values(name, arguments, where)
    return arguments


def _order(top, tables, name, say):
    if "steps" not in top:
        return [s for s in STEP_ORDER if s in tables]
    order = top["steps"]
    if not isinstance(order, list) or not all(isinstance(s, str) for s in order):
        raise DihedraError(f"{name}: steps must be a list of step names, e.g. steps = [\"track\", \"report\"]; "
                           f"got {order!r}.")
    for s in order:
        if s not in STEPS:
            raise DihedraError(f"{name}: unknown step {s!r} in steps{_suggest(s, STEP_ORDER)}; steps are "
                               f"{', '.join(STEP_ORDER)}.")
    for s in tables:
        if s not in order:
            say(f"note: table [{s}] is not listed in steps; it is not run")
    return order


def _out_dir(top, out, base_dir, name):
    if out is not None:
        return os.path.abspath(os.fspath(out))
    if "out" not in top:
        raise DihedraError(f"{name} has no out = \"FOLDER\" (the results folder); add it or give --out.")
    if not isinstance(top["out"], str) or not top["out"].strip():
        raise DihedraError(f"{name}: out must be the name of the results folder; got {top['out']!r}.")
    return _path(top["out"], base_dir)


def load_pipeline(path, out=None, overwrite=False, overrides=None, log=None):
    """Read and check an analysis file; every table is checked before anything runs.

    Parameters
    ----------
    path : str
        The TOML file.
    out : str, optional
        Results folder replacing the file's ``out`` (relative to the current directory).
    overwrite : bool
        Whether a step that makes the results folder may replace an existing one (only a folder
        dihedra made that holds nothing but its files).
    overrides : dict, optional
        ``{step: {key: value}}`` added to the tables, e.g. ``{"track": {"workers": 2}}``.
    log : callable, optional
        Receives the notes.

    Returns
    -------
    Pipeline
    """
    say = log or (lambda msg: None)
    path = os.path.abspath(os.fspath(path))
    data, text = _load_toml(path)
    name = os.path.basename(path)
    tables = {k: v for k, v in data.items() if k not in TOP_LEVEL_KEYS and (
        isinstance(v, dict) or (isinstance(v, list) and v and all(isinstance(x, dict) for x in v)))}
    top = {k: v for k, v in data.items() if k not in tables}
    for key in top:
        if key not in TOP_LEVEL_KEYS:
            raise DihedraError(f"{name}: unknown top-level key {key!r}{_suggest(key, TOP_LEVEL_KEYS)}; valid top-level "
                               f"keys are {', '.join(TOP_LEVEL_KEYS)}, and the tables are steps: "
                               f"{', '.join(STEP_ORDER)}.")
    for key in tables:
        if key not in STEPS:
            raise DihedraError(f"{name}: unknown table [{key}]{_suggest(key, STEP_ORDER)}; tables are steps: "
                               f"{', '.join(STEP_ORDER)}.")
    base = top.get("base_dir", os.path.dirname(path))
    if not isinstance(base, str):
        raise DihedraError(f"{name}: base_dir must be a folder name; got {base!r}.")
    base_dir = os.path.normpath(os.path.join(os.path.dirname(path), os.path.expanduser(base)))
    out_dir = _out_dir(top, out, base_dir, name)
    steps = []
    for s in _order(top, tables, name, say):
        entries = tables.get(s, {})
        entries = entries if isinstance(entries, list) else [entries]
        for k, table in enumerate(entries or [{}]):
            where = f"{name}, [{s}]" + (f" number {k + 1}" if len(entries) > 1 else "")
            arguments = table_arguments(s, {**table, **(overrides or {}).get(s, {})}, base_dir, where)
            steps.append(Step(s, arguments, where))
    if not steps:
        raise DihedraError(f"{name} describes no step to run; add a table such as [track] or a steps list.")
    _share_type_choice(steps, say)
    check_named_types(steps, out_dir)
    _check_report_out(steps)
    if not any(st.spec.creates_folder for st in steps) and not os.path.isdir(out_dir):
        raise DihedraError(f"{name}: no step creates the results folder and {out_dir} does not exist; add a [track] "
                           "table or point out at an existing results folder.")
    return Pipeline(path=path, base_dir=base_dir, out=out_dir, steps=steps, text=text, overwrite=bool(overwrite))


def _check_report_out(steps):
    """A report's ``out`` that names an existing file other than a dihedra report (an input, a
    table) is refused before the first step, as the report step would refuse it at the end."""
    from ..io.outputs import file_head_contains
    from ..presentation.report import REPORT_SIGNATURE

    for st in steps:
        out = st.arguments.get("out") if st.name == "report" else None
        if out and os.path.lexists(out) and not (os.path.isfile(out) and file_head_contains(out, REPORT_SIGNATURE)):
            raise DihedraError(f"{st.where}: out = {out!r} exists and is not a report dihedra wrote; it would be "
                               "left untouched and the report refused at the end: choose another file name.")


def _share_type_choice(steps, say):
    """The types chosen for the figures are the report's too, unless its table chooses its own."""
    chosen = [st.arguments["types"] for st in steps if st.name == "figures" and st.arguments.get("types")]
    for st in steps:
        if st.name == "report" and "types" not in st.arguments and chosen:
            st.arguments["types"] = chosen[-1]
            say(f"note: [report] shows the types of [figures]: {', '.join(map(str, chosen[-1]))}")


# ----------------------------------------------------------------------------------------------
# Running
# ----------------------------------------------------------------------------------------------

def _copy_text(pipe):
    """The analysis file as copied into the results folder: a base_dir line added so it runs anywhere."""
    stamp = time.strftime("%Y-%m-%d %H:%M")
    head = f"# Copied by 'dihedra run' on {stamp} from {pipe.path}\n"
    if "base_dir" in tomllib.loads(pipe.text):
        return head + pipe.text
    return (head + "# Relative paths below are relative to the folder of the original file:\n"
            f"base_dir = {_toml_string(pipe.base_dir)}\n\n" + pipe.text)


def _toml_string(text):
    return '"' + str(text).replace("\\", "\\\\").replace('"', '\\"') + '"'


def _write_copy(pipe, record, created):
    """Copy the analysis file and the record of the steps into the results folder: only once a step
    of this run has made the folder (or, when no step makes one, into the existing results folder,
    replacing only files dihedra wrote there)."""
    if not os.path.isdir(pipe.out) or (not created and any(st.spec.creates_folder for st in pipe.steps)):
        return
    write_text(pipe.out, COPY_NAME, _copy_text(pipe))
    write_json(record, pipe.out, RECORD_NAME)


def _inputs(pipe):
    """The files the steps read (a results folder must never replace one of them)."""
    files = [pipe.path]
    for step in pipe.steps:
        for key in step.spec.paths | step.spec.specs:
            value = step.arguments.get(key)
            for v in (value if isinstance(value, list) else [value]):
                if isinstance(v, str) and os.path.exists(v):
                    files.append(v)
    return files


def run_pipeline(pipe, log=None):
    """Run the steps of a :class:`Pipeline` in order, through the Python API.

    The analysis file is copied into the results folder as soon as it exists (and again after
    every step), with ``analysis.json`` recording each step's call and duration. A failing step
    stops the run; its error names the step.

    Returns
    -------
    str : the results folder.
    """
    say = log or (lambda msg: None)
    record = {"dihedra_version": __version__, "analysis_file": pipe.path,
              "sha256": hashlib.sha256(pipe.text.encode("utf-8")).hexdigest(), "base_dir": pipe.base_dir,
              "results_folder": pipe.out, "started": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
              "notes": list(pipe.notes), "steps": []}
    if any(st.spec.creates_folder for st in pipe.steps):   # before any step: the folder may be made here
        check_folder_target(pipe.out, overwrite=pipe.overwrite, inputs=_inputs(pipe), option="out")
    ctx = _Context(pipe, say)
    created = False
    for k, step in enumerate(pipe.steps, start=1):
        say(f"== step {k}/{len(pipe.steps)}: {step.name}: {step.call()}")
        t0 = time.time()
        entry = {"step": step.name, "call": step.call(), "arguments": dict(step.arguments)}
        try:
            done = step.spec.run(ctx, dict(step.arguments))
        except DihedraError as exc:
            entry.update(status="failed", seconds=round(time.time() - t0, 3), error=str(exc))
            record["steps"].append(entry)
            _write_copy(pipe, record, created)
            raise DihedraError(f"step {step.name} ({step.where}) failed: {exc}") from None
        except KeyboardInterrupt:   # (Ctrl-C or SIGTERM: the record says where it stopped)
            if created:
                entry.update(status="interrupted", seconds=round(time.time() - t0, 3))
                record["steps"].append(entry)
                with contextlib.suppress(Exception):
                    _write_copy(pipe, record, created)
            raise
        if step.spec.creates_folder:
            created = True
            ctx.forget()
        say(f"   {step.name}: {done}")
        entry.update(status="done", seconds=round(time.time() - t0, 3))
        record["steps"].append(entry)
        _write_copy(pipe, record, created)
    record["finished"] = time.strftime("%Y-%m-%dT%H:%M:%S%z")
    _write_copy(pipe, record, created)
    return pipe.out
