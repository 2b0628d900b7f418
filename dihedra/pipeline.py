"""One-file pipelines: a TOML file that describes a whole analysis, run by ``dihedra run``.

The file is the command line written down. Each table names a subcommand and holds exactly the
options of that subcommand, under the same names (``keep_angles`` or ``keep-angles`` for
``--keep-angles``; positional arguments by their name, e.g. ``topology``, ``trajectories``). The
valid keys of a table are read from the argument parser of its subcommand, so the file and the
command line can never drift apart; an unknown key is an error that names the key and every valid
one. Example::

    out = "hexane-results"              # the results folder (relative to this file)
    steps = ["track", "profile", "figures", "report"]   # optional; default: every table, in order

    [track]
    topology = "hexane.pdb"
    trajectories = ["hexane.xtc"]
    torsions = ["rotatable"]
    temperature = 298.15
    keep_angles = true

    [profile]
    pair = [["HEX:C1-C2-C3-C4", "HEX:C2-C3-C4-C5"]]

    [figures]
    format = "pdf,png"

Top-level keys: ``out`` (the results folder), ``steps`` (which tables run, in which order; a step
without a table runs with its defaults) and ``base_dir`` (the folder that relative paths are
relative to; default the folder of the TOML file). Without ``steps``, the tables run in the order
of :data:`STEP_ORDER` (others after them, in file order). A table may be an array of tables
(``[[compare]]``) to run a step several times.

Rules:

* Steps that create the results folder (their ``--out DIR`` is required, as for ``track``) get
  ``out`` from the top level; steps that analyse one (their first argument is ``DIR``) get it as
  that argument. Neither key may be given in their table.
* Values take the TOML type the option needs: ``true``/``false`` for switches, a list for
  repeatable options and options with several values (``torsions = ["rotatable"]``), a list of
  lists for repeatable options with several values each (``pair = [["A", "B"], ["C", "D"]]``).
* Strings are paths relative to ``base_dir`` when the option takes a path (metavar FILE, DIR,
  TRAJ, or the topology), or when they name a file that exists there (a scheme or torsion TOML).
* Every table is checked before the first step runs (unknown keys, wrong types, values the
  subcommand refuses), so a mistake in ``[report]`` does not surface after a long ``track``.
* :func:`run_pipeline` copies the TOML file into the results folder as ``analysis.toml`` (with a
  ``base_dir`` line added, so the copy runs from anywhere) and records the exact command of each
  step, its duration and the file's SHA-256 in ``analysis.json``.
"""

from __future__ import annotations

import argparse
import hashlib
import os
import shlex
import time
import tomllib
from dataclasses import dataclass, field

from .errors import DihedraError, InputFileError

#: Order in which tables run when the file gives no ``steps``.
STEP_ORDER = ("scan", "track", "windows", "profile", "compare", "couplings", "kinetics", "figures", "report")
#: Subcommands that cannot be steps.
NOT_STEPS = ("run", "demo", "torsions")
#: Top-level keys of an analysis file.
TOP_LEVEL_KEYS = ("base_dir", "out", "steps")
#: Name of the copy of the analysis file in the results folder, and of the run record.
COPY_NAME = "analysis.toml"
RECORD_NAME = "analysis.json"

_PATH_WORDS = ("FILE", "DIR", "TRAJ", "TOPOLOGY", "PATH", ".CSV", ".TOML")


# ----------------------------------------------------------------------------------------------
# The parsers of the subcommands
# ----------------------------------------------------------------------------------------------

def subcommand_parsers():
    """The argument parser of every subcommand that can be a step: dict name -> ArgumentParser."""
    from .cli import build_parser

    parser = build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return {name: p for name, p in sub.choices.items() if name not in NOT_STEPS}


@dataclass
class StepSpec:
    """How one subcommand's options map to the keys of its table."""

    name: str
    parser: argparse.ArgumentParser
    keys: dict  # key -> (action, option string or None for positionals)
    folder_key: str | None = None  # positional results folder (analysis steps)
    creates_folder: bool = False  # --out DIR is required (track, windows)

    @property
    def valid_keys(self):
        hidden = {self.folder_key} if self.folder_key else set()
        if self.creates_folder:
            hidden.add("out")
        return sorted(k for k in self.keys if k not in hidden)


def step_spec(name, parser):
    """The keys a table for subcommand ``name`` accepts, read from its parser."""
    keys, folder_key, creates = {}, None, False
    positionals = [a for a in parser._actions if not a.option_strings]
    if positionals and positionals[0].metavar == "DIR":
        folder_key = positionals[0].dest
    for action in parser._actions:
        if isinstance(action, argparse._HelpAction) or action.dest in (argparse.SUPPRESS, "func"):
            continue
        if not action.option_strings:
            keys[action.dest] = (action, None)
            continue
        longs = [o for o in action.option_strings if o.startswith("--")]
        for opt in longs or action.option_strings:
            keys[opt.lstrip("-").replace("-", "_")] = (action, opt)
        if "--out" in action.option_strings and action.required and action.metavar == "DIR":
            creates = True
    return StepSpec(name, parser, keys, folder_key, creates)


# ----------------------------------------------------------------------------------------------
# From a table to command-line arguments
# ----------------------------------------------------------------------------------------------

def _is_path_option(action):
    metavar = action.metavar
    words = " ".join(metavar) if isinstance(metavar, tuple) else str(metavar or "")
    return any(w in words.upper() for w in _PATH_WORDS) or action.dest in ("topology", "trajectories")


def _resolve(value, action, base_dir):
    """A string value as a path relative to ``base_dir`` where it is one (see the module notes)."""
    if not isinstance(value, str) or not value or os.path.isabs(os.path.expanduser(value)):
        return os.path.expanduser(value) if isinstance(value, str) else value
    here = os.path.join(base_dir, value)
    if _is_path_option(action) or os.path.exists(here):
        if not os.path.exists(here) and ":" in value and "FILE" in str(action.metavar or ""):
            head, _, tail = value.rpartition(":")  # FILE:COLUMN
            if os.path.exists(os.path.join(base_dir, head)):
                return os.path.normpath(os.path.join(base_dir, head)) + ":" + tail
        return os.path.normpath(here)
    return value


def _scalar(value, where, key):
    if isinstance(value, bool):
        raise DihedraError(f"{where}: key {key!r} takes a value, not true/false.")
    if isinstance(value, (list, dict)):
        raise DihedraError(f"{where}: key {key!r} takes one value; got {value!r}.")
    return repr(value) if isinstance(value, float) else str(value)


def table_to_argv(spec, table, base_dir, where):
    """Command-line arguments of subcommand ``spec.name`` from a table of the analysis file.

    Raises :class:`DihedraError` naming the key (and the valid keys) for unknown keys and wrong
    value types.
    """
    argv_opts, positionals = [], {}
    valid = spec.valid_keys
    for raw_key, value in table.items():
        key = str(raw_key).replace("-", "_")
        if key not in spec.keys or key not in valid:
            if key == spec.folder_key or (spec.creates_folder and key == "out"):
                raise DihedraError(f"{where}: key {raw_key!r} is set by the pipeline from the top-level 'out'; "
                                   "remove it from the table.")
            raise DihedraError(f"{where}: unknown key {raw_key!r}; valid keys are {', '.join(valid)}.")
        action, opt = spec.keys[key]
        res = lambda v: _resolve(v, action, base_dir)  # noqa: E731
        if opt is None:
            items = value if isinstance(value, list) else [value]
            positionals[action.dest] = [_scalar(res(v), where, key) for v in items]
            continue
        if action.nargs == 0:  # a switch: true passes it, false leaves it out
            if isinstance(action, argparse._CountAction) and isinstance(value, int) and not isinstance(value, bool):
                argv_opts += [opt] * max(0, value)
                continue
            if not isinstance(value, bool):
                raise DihedraError(f"{where}: key {raw_key!r} is a switch: give true or false; got {value!r}.")
            if value:
                argv_opts.append(opt)
            continue
        nargs = action.nargs
        many = nargs in ("+", "*") or (isinstance(nargs, int) and nargs > 1)
        if isinstance(action, argparse._AppendAction):
            if many and isinstance(value, list) and value and all(isinstance(v, list) for v in value):
                groups = value
            elif many:
                groups = [value if isinstance(value, list) else [value]]
            else:
                groups = [[v] for v in (value if isinstance(value, list) else [value])]
        else:
            if many:
                groups = [value if isinstance(value, list) else [value]]
            else:
                groups = [[value]]
        for g in groups:
            if isinstance(nargs, int) and nargs > 1 and len(g) != nargs:
                raise DihedraError(f"{where}: key {raw_key!r} takes {nargs} values per entry; got {g!r}.")
            argv_opts += [opt] + [_scalar(res(v), where, key) for v in g]
    argv = []
    for action in (a for a in spec.parser._actions if not a.option_strings):
        if action.dest == spec.folder_key:
            argv.append(None)  # the results folder, filled in by the pipeline
        elif action.dest in positionals:
            argv += positionals[action.dest]
    return argv + argv_opts


def parse_step(spec, argv, where):
    """Parse ``argv`` with the subcommand's parser; its refusals become :class:`DihedraError`."""
    parser = spec.parser

    def fail(message):
        raise DihedraError(f"{where}: {message}.")

    saved = parser.error
    parser.error = fail
    try:
        return parser.parse_args(argv)
    finally:
        parser.error = saved


# ----------------------------------------------------------------------------------------------
# The pipeline
# ----------------------------------------------------------------------------------------------

@dataclass
class Step:
    """One step: the subcommand, the arguments it runs with, and where it came from."""

    name: str
    argv: list
    where: str
    spec: StepSpec

    def command(self):
        return "dihedra " + " ".join(shlex.quote(a) for a in [self.name] + self.argv)


@dataclass
class Pipeline:
    """An analysis file, checked and turned into steps."""

    path: str
    base_dir: str
    out: str
    steps: list
    text: str
    notes: list = field(default_factory=list)


def _load_toml(path):
    try:
        with open(path, "rb") as fh:
            raw = fh.read()
    except OSError as exc:
        raise InputFileError(f"cannot read the analysis file {path}: {exc.strerror}.") from None
    try:
        data = tomllib.loads(raw.decode("utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise InputFileError(f"the analysis file {path} is not valid TOML: {exc}.") from None
    return data, raw.decode("utf-8")


def load_pipeline(path, out=None, overrides=None, skip_missing=False, log=None):
    """Read and check an analysis file; every step's arguments are parsed before anything runs.

    Parameters
    ----------
    path : str
        The TOML file.
    out : str, optional
        Results folder replacing the file's ``out`` (relative to the current directory).
    overrides : dict, optional
        ``{step: {key: value}}`` added to the tables (keys as in the file), e.g. ``{"track":
        {"overwrite": True}}``; a key the step does not have is ignored.
    skip_missing : bool
        Leave out, with a note, steps whose subcommand this installation lacks (the demo uses this);
        otherwise they are errors.
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
    specs = {k: step_spec(k, p) for k, p in subcommand_parsers().items()}
    known = set(specs) | set(STEP_ORDER)
    tables = {k: v for k, v in data.items() if k not in TOP_LEVEL_KEYS and (
        isinstance(v, dict) or (isinstance(v, list) and v and all(isinstance(x, dict) for x in v)))}
    top = {k: v for k, v in data.items() if k not in tables}
    for key in top:
        if key not in TOP_LEVEL_KEYS:
            raise DihedraError(f"{name}: unknown top-level key {key!r}; valid top-level keys are "
                               f"{', '.join(TOP_LEVEL_KEYS)}, and the tables are steps: "
                               f"{', '.join(s for s in STEP_ORDER if s in specs)}.")
    for key in tables:
        if key not in known:
            raise DihedraError(f"{name}: unknown table [{key}]; tables are steps: "
                               f"{', '.join(sorted(specs))}.")
    base = top.get("base_dir", os.path.dirname(path))
    if not isinstance(base, str):
        raise DihedraError(f"{name}: base_dir must be a folder name; got {base!r}.")
    base_dir = os.path.normpath(os.path.join(os.path.dirname(path), os.path.expanduser(base)))
    if out is not None:
        out_dir = os.path.abspath(os.fspath(out))
    elif "out" in top:
        if not isinstance(top["out"], str) or not top["out"]:
            raise DihedraError(f"{name}: out must be the name of the results folder; got {top['out']!r}.")
        out_dir = os.path.normpath(os.path.join(base_dir, os.path.expanduser(top["out"])))
    else:
        raise DihedraError(f"{name} has no out = \"FOLDER\" (the results folder); add it or give --out.")
    if "steps" in top:
        order = top["steps"]
        if not isinstance(order, list) or not all(isinstance(s, str) for s in order):
            raise DihedraError(f"{name}: steps must be a list of step names, e.g. steps = [\"track\", \"report\"]; "
                               f"got {order!r}.")
        for s in order:
            if s not in known:
                raise DihedraError(f"{name}: unknown step {s!r} in steps; steps are {', '.join(sorted(specs))}.")
        for s in tables:
            if s not in order:
                say(f"note: table [{s}] is not listed in steps; it is not run")
    else:
        order = [s for s in STEP_ORDER if s in tables] + [s for s in tables if s not in STEP_ORDER]
    notes, steps = [], []
    for s in order:
        if s not in specs:
            if skip_missing:
                note = f"step {s!r} is not available in this version of dihedra; left out"
                notes.append(note)
                say(f"note: {note}")
                continue
            raise DihedraError(f"{name}: step {s!r} needs 'dihedra {s}', which this version does not have.")
        spec = specs[s]
        entries = tables.get(s, {})
        entries = entries if isinstance(entries, list) else [entries]
        for k, table in enumerate(entries or [{}]):
            if not isinstance(table, dict):
                raise DihedraError(f"{name}: [{s}] must be a table of options; got {table!r}.")
            extra = {key: v for key, v in (overrides or {}).get(s, {}).items()
                     if key.replace("-", "_") in spec.keys}
            where = f"{name}, [{s}]" + (f" number {k + 1}" if len(entries) > 1 else "")
            argv = table_to_argv(spec, {**table, **extra}, base_dir, where)
            argv = [out_dir if a is None else a for a in argv]
            if spec.creates_folder:
                argv += ["--out", out_dir]
            parse_step(spec, argv, where)
            steps.append(Step(s, argv, where, spec))
    if not steps:
        raise DihedraError(f"{name} describes no step to run; add a table such as [track] or a steps list.")
    if not any(st.spec.creates_folder for st in steps) and not os.path.isdir(out_dir):
        raise DihedraError(f"{name}: no step creates the results folder and {out_dir} does not exist; add a [track] "
                           "table or point out at an existing results folder.")
    return Pipeline(path=path, base_dir=base_dir, out=out_dir, steps=steps, text=text, notes=notes)


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
    from .io.outputs import write_file, write_text
    from .io.resultsdir import write_json

    if not os.path.isdir(pipe.out) or (not created and any(st.spec.creates_folder for st in pipe.steps)):
        return
    write_text(pipe.out, COPY_NAME, _copy_text(pipe))
    write_file(pipe.out, RECORD_NAME, lambda tmp: write_json(record, os.path.dirname(tmp), os.path.basename(tmp)))


def run_pipeline(pipe, log=None):
    """Run the steps of a :class:`Pipeline` in order, through the subcommands.

    The analysis file is copied into the results folder as soon as it exists (and again at the
    end), with ``analysis.json`` recording each step's command and duration. A failing step stops
    the run; its error names the step.

    Returns
    -------
    str : the results folder.
    """
    from ._version import __version__

    say = log or (lambda msg: None)
    record = {"dihedra_version": __version__, "analysis_file": pipe.path,
              "sha256": hashlib.sha256(pipe.text.encode("utf-8")).hexdigest(), "base_dir": pipe.base_dir,
              "results_folder": pipe.out, "started": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
              "notes": list(pipe.notes), "steps": []}
    creating = [st for st in pipe.steps if st.spec.creates_folder]
    if creating:   # before any step: the results folder may be made (or replaced) here
        from .io.outputs import check_folder_target
        first = parse_step(creating[0].spec, creating[0].argv, creating[0].where)
        check_folder_target(pipe.out, overwrite=bool(getattr(first, "overwrite", False)), inputs=[pipe.path],
                            option="out")
    created = False
    for k, step in enumerate(pipe.steps, start=1):
        say(f"== step {k}/{len(pipe.steps)}: {step.command()}")
        args = parse_step(step.spec, step.argv, step.where)
        t0 = time.time()
        entry = {"step": step.name, "command": step.command(), "argv": list(step.argv)}
        try:
            status = args.func(args)
        except DihedraError as exc:
            entry.update(status="failed", seconds=round(time.time() - t0, 3), error=str(exc))
            record["steps"].append(entry)
            _write_copy(pipe, record, created)
            raise DihedraError(f"step {step.name} ({step.where}) failed: {exc}") from None
        if status not in (None, 0):
            raise DihedraError(f"step {step.name} ({step.where}) ended with status {status}.")
        entry.update(status="done", seconds=round(time.time() - t0, 3))
        record["steps"].append(entry)
        created = created or step.spec.creates_folder
        _write_copy(pipe, record, created)
    record["finished"] = time.strftime("%Y-%m-%dT%H:%M:%S%z")
    _write_copy(pipe, record, created)
    return pipe.out
