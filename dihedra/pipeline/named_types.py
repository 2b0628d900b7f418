"""The torsion types and labels that the tables of an analysis file name (``types = [...]``),
checked against the torsions of the run before the first step, so that a misspelt type in
``[compare]`` stops the file at once instead of after a long ``[track]``."""

from __future__ import annotations

import os

import pandas as pd

from ..errors import DihedraError
from ..selection.specs import select_torsions
from ..trajectory.inputs import load_universe


def check_named_types(steps, out):
    """Raise :class:`DihedraError` naming the table of the first type or label that the run will not
    have. The run's torsions are those its ``[track]`` table selects (its topology and first
    trajectory, read as track reads them), else those of the results folder ``out``; where neither
    can tell (a track that will fail on its own, a folder that does not exist yet), nothing is
    checked here."""
    named = [(st, t) for st in steps if st.name != "track"
             for t in _as_list(st.arguments.get("types")) if str(t) != "all"]
    if not named:
        return
    known = _known_torsions(steps, out)
    if known is None:
        return
    types, labels = known
    for st, name in named:
        if name not in types and name not in labels:
            shown = ", ".join(sorted(types)[:6]) + (", ..." if len(types) > 6 else "")
            raise DihedraError(f"{st.where}: torsion type {name!r} is not among the torsions of this run "
                               f"(types: {shown}); name a type or a torsion label, or 'all'.")


def _known_torsions(steps, out):
    track = next((st for st in steps if st.name == "track"), None)
    if track is None:
        path = os.path.join(out, "torsions.csv")
        if not os.path.exists(path):
            return None
        table = pd.read_csv(path, usecols=["torsion", "type"])
        return set(table["type"].astype(str)), set(table["torsion"].astype(str))
    a = track.arguments
    trajectories = _as_list(a.get("trajectories"))
    try:
        universe = load_universe(a["topology"], trajectories[0] if trajectories else None)
        tset = select_torsions(universe, a.get("torsions", "rotatable"), keep_variants=bool(a.get("keep_variants")))
    except DihedraError:   # (the track step says it in its own words)
        return None
    return set(tset.types), set(tset.labels)


def _as_list(value):
    if value is None:
        return []
    return [value] if isinstance(value, str) else list(value)
