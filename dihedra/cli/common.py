"""Options and printing shared by several subcommands (one set of option names everywhere)."""

from __future__ import annotations

import argparse
import re
import sys

import numpy as np

from ..errors import DihedraError, name_list
from ..selection.torsions import expand_type_patterns, has_pattern


def add_torsion_options(parser, required=True):
    parser.add_argument("--torsions", action="append", metavar="SPEC", required=required,
                        help="torsions to follow (repeatable): 'rotatable', 'protein-backbone', "
                             "'protein-sidechains', 'nucleic-backbone', four 0-based atom indices "
                             "'A,B,C,D', or a .toml file of named torsions")
    parser.add_argument("--keep-variants", action="store_true",
                        help="type protein and nucleic-acid torsions by the topology's residue name "
                             "(HSD:psi, HSE:psi) instead of the residue it is a force-field variant of "
                             "(HIS:psi, the default); torsions.csv names the variant either way")


def add_scheme_option(parser):
    parser.add_argument("--scheme", default=None, metavar="NAME",
                        help="state scheme: anti-gauche, staggered-eclipsed[:N], klyne-prelog, cis-trans, "
                             "coplanar-perpendicular, symmetric-rotor, syn-anti, sugar-pucker, chi-rotamers, protein "
                             "(cis-trans omega, rotamer wells of chi, anti-gauche otherwise), nucleic (syn-anti "
                             "chi, sugar-pucker delta, g+/t/g- otherwise), or a .toml file of named sectors; "
                             "chosen per torsion type: auto (from the chemistry of the central bond: 3-fold "
                             "sp3-sp3, 6- or 2-fold sp2-sp3, cis/trans amides, one state for CH3/CF3 rotors, "
                             "ring torsions flagged), basins (the free-energy basins of the sampled distribution, "
                             "by a first pass; needs --temperature), or a .toml scheme map of [[rule]] tables "
                             "(bond/types/torsions -> scheme); default: protein when only protein torsions are "
                             "tracked, nucleic for nucleic-backbone alone, else anti-gauche")


class _Extend(argparse.Action):
    """``--types A B --types C``: every value given, in order. An older name of an option takes its
    values too, with a note (``renamed_to``)."""

    renamed_to = None

    def __call__(self, parser, namespace, values, option_string=None):
        values = [values] if isinstance(values, str) else list(values)
        setattr(namespace, self.dest, (getattr(namespace, self.dest, None) or []) + values)
        if self.renamed_to:
            say(f"note: {option_string} is now {self.renamed_to} (one name in every command)")


class _Renamed(argparse._StoreAction):
    """An older name of a one-value option: stores the value, with a note naming the new one."""

    renamed_to = None

    def __call__(self, parser, namespace, values, option_string=None):
        setattr(namespace, self.dest, values)
        if self.renamed_to:
            say(f"note: {option_string} is now {self.renamed_to} (one name in every command)")


def add_renamed(parser, old, new, dest, **kwargs):
    """An older option name, hidden from --help, that still works (with a note naming the new one)."""
    action = parser.add_argument(old, dest=dest, help=argparse.SUPPRESS, **kwargs)
    action.renamed_to = new
    return action


def add_types_option(parser, what, former=()):
    """``--types TYPE [TYPE ...]``, the one option that chooses torsion types in every command that
    reads a results folder: ``what`` is its help (say whether a torsion label chooses one torsion);
    it is repeatable. ``former`` are older names of the option, still taken with a note."""
    parser.add_argument("--types", nargs="+", action=_Extend, default=None, metavar="TYPE", dest="types",
                        help=what + "; names as in torsions.csv, or shell-style patterns in quotes ('POPE:C2*'), "
                                    "repeatable")
    for old in former:
        add_renamed(parser, old, "--types", "types", nargs="+", action=_Extend)


def expand_types_option(args):
    """``--types`` with shell-style patterns (``'POPE:C2*'``, ``'*:chi1'``): each pattern becomes
    the matching types of the results folder ``args.folder``, in the folder's order (names without
    ``*``, ``?`` or ``[`` are left to the command); ``all`` is every type (unless a type has that
    name). A pattern that matches nothing is an error."""
    types, folder = getattr(args, "types", None), getattr(args, "folder", None)
    if not types or folder is None or not any(has_pattern(t) or t == "all" for t in types):
        return
    from ..io.tables import read_table

    try:
        known = list(dict.fromkeys(read_table(folder, "torsions.csv", columns=["type"])["type"].astype(str)))
    except DihedraError:
        return   # (no results folder: the command says so itself)
    types = ["*" if t == "all" and "all" not in known else t for t in types]
    args.types = expand_type_patterns(types, known, f"--types (in {folder})")


def add_overwrite_option(parser, what):
    """``--overwrite`` of an analysis command: replace its own earlier outputs in the folder."""
    parser.add_argument("--overwrite", action="store_true",
                        help=f"replace the {what} of an earlier run in DIR (without it the command stops "
                             "when they are there; files dihedra did not write are never replaced)")


def workers_option(text):
    """``--workers``: ``auto`` or a whole number of at least 1."""
    if text == "auto":
        return text
    try:
        value = int(text)
    except ValueError:
        value = 0
    if value < 1:
        raise argparse.ArgumentTypeError(f"give 'auto' or a whole number of at least 1, not {text!r}")
    return value


def add_track_options(parser):
    """The options of the trajectory pass (shared by 'track' and 'demo')."""
    parser.add_argument("--start", type=int, default=None, metavar="N", help="first frame (0-based)")
    parser.add_argument("--stop", type=int, default=None, metavar="N", help="stop before this frame")
    parser.add_argument("--step", type=int, default=None, metavar="N", help="use every N-th frame")
    parser.add_argument("--workers", type=workers_option, default="auto", metavar="N",
                        help="worker processes per replica: 'auto' (default) uses as many as pay on "
                             "this machine for the size of the run, N at most N (exactly N with "
                             "--backend); the choice is printed. Results equal a serial run")
    parser.add_argument("--threads", type=int, default=None, choices=[1, 2], metavar="{1,2}",
                        help="threads of a run without --workers: 2 reads the trajectory in one thread while "
                             "the other computes (the default where two cores are free), 1 does both in "
                             "one; the results are the same")
    parser.add_argument("--backend", default=None, choices=["serial", "multiprocessing", "dask"],
                        help="parallel backend for --workers > 1 (default multiprocessing)")
    parser.add_argument("--scheduler", default=None, metavar="ADDRESS",
                        help="run on a dask.distributed scheduler (e.g. tcp://host:8786): frames are "
                             "spread over all its workers; they must share the file system")
    parser.add_argument("--keep-angles", action="store_true",
                        help="also write the angle time series (angles.parquet, float32 degrees)")
    parser.add_argument("--weights", metavar="FILE[:COLUMN]", default=None,
                        help="CSV of per-frame weights for reweighting a biased run (column 'weight' "
                             "or the last one; matched by 'replica'/'frame' columns if present)")
    parser.add_argument("--dt-ps", type=float, default=None, metavar="PS",
                        help="time between stored frames in ps (replaces the trajectory's own)")
    parser.add_argument("--temperature", type=float, default=None, metavar="K",
                        help="simulation temperature in kelvin, recorded for later steps")
    parser.add_argument("--overwrite", action="store_true",
                        help="replace an existing results folder that dihedra made and that holds only its files")


def say(message, file=None):
    print(message, file=file or sys.stderr)


def print_notices(notices):
    for note in notices:
        say(f"note: {note}")


def format_pm(value, err, digits=3):
    """``value ± err``; ``value ± n/a`` where the error could not be estimated (NaN), never 0; a
    number that rounds to zero is printed without a sign (``180.0 ± 0.0``, not ``± -0.0``)."""
    if value is None or (isinstance(value, float) and np.isnan(value)):
        return "-"
    if err is None:
        return _fixed(value, digits)
    if np.isnan(err):
        return f"{_fixed(value, digits)} ± n/a"
    return f"{_fixed(value, digits)} ± {_fixed(err, digits)}"


def _fixed(x, digits):
    """``x`` to ``digits`` decimals, without the sign of a negative zero ("-0.0")."""
    return f"{round(float(x), digits) + 0.0:.{digits}f}"


def print_population_table(by_type, state_order, out=None, max_rows=40):
    """Pooled populations as compact tables: one row per type, one column per state; types whose
    torsions take different states (a set of schemes: omega cis/trans, chi rotamers) get a table
    each."""
    out = out or sys.stdout
    types = list(dict.fromkeys(by_type["type"]))
    key = by_type.set_index(["type", "state"])
    states_of = by_type.groupby("type", sort=False)["state"].agg(lambda x: tuple(x))
    width = max([len("type")] + [len(t) for t in types[:max_rows]])
    cell = 15
    shown = types[:max_rows]
    for states in dict.fromkeys(states_of[t] for t in shown):
        cols = [s for s in state_order if s in states]
        print(f"{'type':<{width}}  {'n':>4}  " + "  ".join(f"{s:>{cell}}" for s in cols), file=out)
        for t in shown:
            if states_of[t] != states:
                continue
            n = int(key.loc[(t, cols[0]), "n_torsions"])
            cells = [format_pm(key.loc[(t, s), "population"], key.loc[(t, s), "population_err"]) for s in cols]
            print(f"{t:<{width}}  {n:>4}  " + "  ".join(f"{c:>{cell}}" for c in cells), file=out)
    if len(types) > max_rows:
        print(f"... and {len(types) - max_rows} more types (see populations_by_type.csv)", file=out)


def print_verdicts(table, head, max_rows=40):
    """The verdict of every type of a convergence table under ``head``: types of the same verdict
    on one line (a protein's omega types all "never changed state"), the explanation of too few
    effective samples once (the table has it in every verdict)."""
    print(head + ":")
    groups, explained = {}, None
    for row in table.itertuples(index=False):
        verdict = str(row.verdict)
        found = _EXPLAINED.search(verdict)
        if found:
            explained = found.group(2)
            verdict = verdict[:found.start()] + f"({found.group(1)})" + verdict[found.end():]
        groups.setdefault(verdict, []).append(str(row.type))
    lines = list(groups.items())
    width = max(len("type"), *(len(types[0]) for _, types in lines[:max_rows]))
    for verdict, types in lines[:max_rows]:
        if len(types) == 1:
            print(f"  {types[0]:<{width}}  {verdict}")
        else:
            print(f"  {len(types)} types ({name_list(types, 6)}): {verdict}")
    if len(lines) > max_rows:
        rest = sum(len(types) for _, types in lines[max_rows:])
        print(f"  ... and {rest} more types (see convergence.csv)")
    if explained:
        print(f"  (effective samples: {explained})")


#: The explanation in a verdict of too few effective samples: "(11.8: the run holds ...)".
_EXPLAINED = re.compile(r"\(([^():]+): (the run holds about that many [^()]*)\)")
