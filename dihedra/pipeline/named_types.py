"""The torsion types and labels that the tables of an analysis file name (``types = [...]``,
``pairs``), checked against the torsions of the run before the first step, so that a misspelt type
in ``[compare]`` stops the file at once instead of after a long ``[track]``; and the steps that
need the angle time series, checked against ``[track]``'s ``keep_angles``."""

from __future__ import annotations

import os

import pandas as pd

from ..errors import DihedraError
from ..selection.specs import select_torsions
from ..selection.torsions import expand_type_patterns, has_pattern
from ..trajectory.inputs import load_universe


def check_named_types(steps, out):
    """Raise :class:`DihedraError` naming the table of the first type or label that the run will not
    have. The run's torsions are those its ``[track]`` table selects (its topology and first
    trajectory, read as track reads them), else those of the results folder ``out``; where neither
    can tell (a track that will fail on its own, a folder that does not exist yet), nothing is
    checked here."""
    check_angles_kept(steps)
    patterned = [st for st in steps
                 if st.name != "track" and any(has_pattern(t) or _every(st, t) for t in _as_list(st.arguments.get("types")))]
    if patterned:   # shell-style patterns become the run's matching types, as --types on the command line
        known = _known_torsions(steps, out)
        if known is None:
            raise DihedraError(f"{patterned[0].where}: types given as patterns need the run's torsions, and neither "
                               "a [track] table nor the results folder tells them; name the types.")
        order = known[2]
        for st in patterned:   # ('all': every type, unless a type has that name)
            given = ["*" if _every(st, t) and "all" not in order else t for t in _as_list(st.arguments["types"])]
            st.arguments["types"] = expand_type_patterns(given, order, f"{st.where}: types")
    # ('all' is also compare's own word for every type: left to it)
    named = [(st, t, "types") for st in steps if st.name != "track"
             for t in _as_list(st.arguments.get("types")) if not (str(t) == "all" and st.name == "compare")]
    named += [(st, t, "pairs") for st in steps if st.name == "profile" for pair in _as_list(st.arguments.get("pairs"))
              for t in _as_list(pair)]
    if not named:
        return
    known = _known_torsions(steps, out)
    if known is None:
        return
    types, labels, _ = known
    for st, name, key in named:
        if name not in types and name not in labels:
            shown = ", ".join(sorted(types)[:6]) + (", ..." if len(types) > 6 else "")
            every = " in pairs" if key == "pairs" else ", or 'all'"
            raise DihedraError(f"{st.where}: torsion type {name!r} is not among the torsions of this run "
                               f"(types: {shown}); name a type or a torsion label{every}.")


def _every(step, name):
    """Whether ``name`` in the types of ``step`` is 'all' (every type) to be expanded here (compare
    takes it itself)."""
    return str(name) == "all" and step.name != "compare"


def check_angles_kept(steps):
    """Raise :class:`DihedraError` before the first step when a step needs the angle time series
    (2-D profiles, kinetics with its own core margin, Ramachandran regions, a refit) and the
    file's ``[track]`` does not keep it (``keep_angles``)."""
    from ..trajectory.cores import CORE_MARGIN_DEG

    track = next((st for st in steps if st.name == "track"), None)
    if track is None or track.arguments.get("keep_angles"):
        return
    for st in steps:
        a = st.arguments
        why = ("its pairs (2-D profiles)" if st.name == "profile" and a.get("pairs") else
               "a core margin other than track's" if st.name == "kinetics" and a.get("core_margin_deg") not in (
                   None, CORE_MARGIN_DEG) else
               "the phi and psi angles of every frame" if st.name == "ramachandran" else
               "every frame's angles to reweight" if st.name == "refit" else None)
        if why:
            raise DihedraError(f"{st.where} needs {why}, and [track] does not keep the angles: add keep_angles = "
                               "true to [track].")


def _known_torsions(steps, out):
    track = next((st for st in steps if st.name == "track"), None)
    if track is None:
        path = os.path.join(out, "torsions.csv")
        if not os.path.exists(path):
            return None
        table = pd.read_csv(path, usecols=["torsion", "type"])
        order = list(dict.fromkeys(table["type"].astype(str)))
        return set(order), set(table["torsion"].astype(str)), order
    a = track.arguments
    trajectories = _as_list(a.get("trajectories"))
    try:
        universe = load_universe(a["topology"], trajectories[0] if trajectories else None)
        tset = select_torsions(universe, a.get("torsions", "rotatable"), keep_variants=bool(a.get("keep_variants")))
    except DihedraError:   # (the track step says it in its own words)
        return None
    return set(tset.types), set(tset.labels), list(dict.fromkeys(tset.types))


def _as_list(value):
    if value is None:
        return []
    return [value] if isinstance(value, str) else list(value)
