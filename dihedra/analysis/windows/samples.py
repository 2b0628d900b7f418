r"""The window table and the samples of all windows.

Input
-----
A table of windows (``WINDOWS.csv``, or a DataFrame with the same columns), one row per biased
simulation, with the columns

``trajectory``, ``topology``
    files of the window (relative paths are relative to the CSV; for a DataFrame, to the current
    folder);
``torsions``
    the biased torsion(s), a specification as in ``dihedra track --torsions`` (``0,1,2,3`` --
    quote it in the CSV --, ``rotatable``, a .toml file; several joined by ``;``);
``centre_deg``, ``k_kj_mol_rad2``
    the bias :math:`w_k(\phi) = \tfrac12 k_k\, d(\phi, c_k)^2`, d the minimum-image difference
    between the angle and the centre in radians (so ``|d| <= pi``), applied to every selected torsion.

Every window must select the same torsions (the same labels). The bias must be exactly this
function of the IUPAC torsion angle; e.g. in OpenMM a ``CustomTorsionForce`` with the energy
``0.5*k*min(dtheta, 2*pi-dtheta)^2; dtheta = abs(theta-theta0)``.

Samples
-------
Each window is tracked like a replica (:func:`dihedra.tracking.track` with ``keep_angles``). Each
selected torsion in each analysed frame is one sample, biased by its own w_k. With one biased
torsion per window (the usual case) this is exact. With several (e.g. a box of identical
molecules, each biased on its own torsion) the samples of one window are treated as draws from
p_k(phi) ~ p(phi) exp(-w_k(phi)/kT) each: exact when the molecules do not interact (a gas of
copies), an approximation when they do (the others' biases then shift a molecule's environment
slightly); the output says so.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ...errors import DihedraError, InputFileError
from ...units import wrap_deg

#: Columns of WINDOWS.csv.
WINDOW_COLUMNS = ("trajectory", "topology", "torsions", "centre_deg", "k_kj_mol_rad2")
#: Histogram blocks per window (the bootstrap unit).
N_HIST_BLOCKS = 16
#: State-count blocks per window (for the blocking errors of populations.csv).
N_STATE_BLOCKS = 64


# ----------------------------------------------------------------------------------------------
# Input
# ----------------------------------------------------------------------------------------------

def read_windows(windows):
    """The window table with absolute paths: columns window, trajectory, topology, torsions,
    centre_deg (wrapped to (-180, 180]), k_kj_mol_rad2.

    ``windows`` is the path of the CSV (relative file paths in it are relative to the CSV) or a
    DataFrame with the same columns (relative file paths relative to the current folder).
    """
    if isinstance(windows, pd.DataFrame):
        return _window_table(windows.copy(), "window table", os.getcwd())
    path = os.fspath(windows)
    if not os.path.exists(path):
        raise InputFileError(f"window table {path} does not exist.")
    try:
        table = pd.read_csv(path, skipinitialspace=True, dtype={"torsions": str}, comment="#")
    except Exception as exc:  # noqa: BLE001
        raise InputFileError(f"window table {path} is not a readable CSV table: {exc}.") from None
    return _window_table(table, f"window table {path}", os.path.dirname(os.path.abspath(path)))


def _window_table(table, name, base):
    """Check a window table (``name`` in messages) and make its paths absolute (relative to ``base``)."""
    table.columns = [str(c).strip() for c in table.columns]
    missing = [c for c in WINDOW_COLUMNS if c not in table.columns]
    if missing:
        raise InputFileError(f"{name} lacks the column(s) {', '.join(missing)}; it needs "
                             f"{', '.join(WINDOW_COLUMNS)}.")
    if len(table) < 2:
        raise InputFileError(f"{name} has {len(table)} window(s); umbrella sampling needs at least two.")
    out = pd.DataFrame({"window": np.arange(len(table))})
    for col in ("trajectory", "topology"):
        out[col] = [p if os.path.isabs(p) else os.path.normpath(os.path.join(base, p))
                    for p in table[col].astype(str).str.strip()]
    out["torsions"] = table["torsions"].astype(str).str.strip()
    for col in ("centre_deg", "k_kj_mol_rad2"):
        values = pd.to_numeric(table[col], errors="coerce")
        bad = ~np.isfinite(values) | ((values <= 0) if col == "k_kj_mol_rad2" else False)
        if bad.any():
            row = int(np.flatnonzero(bad)[0])
            what = "a positive number" if col == "k_kj_mol_rad2" else "a number of degrees"
            raise InputFileError(f"{name}, row {row + 1}: {col} must be {what}; got "
                                 f"{table[col].iloc[row]!r}.")
        out[col] = values.to_numpy(float)
    out["centre_deg"] = wrap_deg(out["centre_deg"].to_numpy())
    return out


def window_inputs(table, source=None):
    """The input files of a window analysis: the table's file ``source`` (if any), the trajectories,
    topologies and torsion files of ``table`` (from :func:`read_windows`). A results folder never
    replaces a folder that holds one of them."""
    return [*([source] if source is not None else []), *table["trajectory"], *table["topology"],
            *(t for t in table["torsions"] if os.path.exists(t))]


# ----------------------------------------------------------------------------------------------
# Samples of all windows
# ----------------------------------------------------------------------------------------------

@dataclass
class WindowData:
    """Samples of all windows, one entry per (frame, torsion).

    Attributes
    ----------
    windows : DataFrame
        The window table (:func:`read_windows`) plus n_frames.
    angle_deg, window, torsion, frame_pos, hist_block, state_block : ndarray (n_samples,)
        Angle, window, torsion position, frame position within its window, global histogram
        block (window * 16 + b) and global state block (window * 64 + b).
    tracks : list of TrackResult
        The per-window tracking results (torsion tables, summaries, notices).
    """

    windows: pd.DataFrame
    angle_deg: np.ndarray
    window: np.ndarray
    torsion: np.ndarray
    frame_pos: np.ndarray
    hist_block: np.ndarray
    state_block: np.ndarray
    tracks: list
    n_frames: np.ndarray
    notices: list = field(default_factory=list)


def collect_windows(windows, scheme="anti-gauche", start=None, stop=None, step=None, workers=1, log=None):
    """Track every window and gather its torsion angles as samples.

    Parameters
    ----------
    windows : DataFrame
        From :func:`read_windows`.
    scheme : str or StateScheme
    start, stop, step : int, optional
        Frame range applied to every window (e.g. ``start`` to drop equilibration).
    workers : int
    log : callable, optional
    """
    from ...tracking import track

    say = log or (lambda msg: None)
    tracks, parts, notices, n_frames, timeless = [], [], [], [], []
    for row in windows.itertuples(index=False):
        say(f"window {row.window + 1}/{len(windows)}: centre {row.centre_deg:g} deg, k {row.k_kj_mol_rad2:g} "
            f"kJ/mol/rad2: {row.trajectory}")
        specs = [s.strip() for s in row.torsions.split(";") if s.strip()]
        res = track(row.topology, [row.trajectory], torsions=specs, scheme=scheme, start=start, stop=stop,
                    step=step, workers=workers, keep_angles=True, progress=False,
                    n_state_blocks=N_STATE_BLOCKS, n_hist_blocks=N_HIST_BLOCKS)
        if tracks and res.torsion_set.labels != tracks[0].torsion_set.labels:
            first, here = tracks[0].torsion_set.labels, res.torsion_set.labels
            raise DihedraError(f"window {row.window + 1} selects {len(here)} torsion(s) ({here[0]}, ...) but window 1 "
                               f"selects {len(first)} ({first[0]}, ...); every window must bias the same torsions.")
        _add_window_notices(res, row.trajectory, notices, timeless)
        ang = res.angles()
        labels = res.torsion_set.labels
        values = ang[labels].to_numpy(dtype=float)  # (n_frames, n_torsions)
        n = values.shape[0]
        n_frames.append(n)
        pos = np.repeat(np.arange(n), values.shape[1])
        tors = np.tile(np.arange(values.shape[1]), n)
        flat = values.reshape(-1)
        ok = np.isfinite(flat)
        parts.append((flat[ok], np.full(ok.sum(), row.window), tors[ok], pos[ok],
                      row.window * N_HIST_BLOCKS + pos[ok] * N_HIST_BLOCKS // n,
                      row.window * N_STATE_BLOCKS + pos[ok] * N_STATE_BLOCKS // n))
        tracks.append(res)
    if timeless:
        notices.append(_time_step_notice(timeless, len(windows)))
    arrays = [np.concatenate([p[k] for p in parts]) for k in range(6)]
    table = windows.copy()
    table["n_frames"] = n_frames
    return WindowData(table, arrays[0], arrays[1].astype(np.int64), arrays[2].astype(np.int64),
                      arrays[3].astype(np.int64), arrays[4].astype(np.int64), arrays[5].astype(np.int64),
                      tracks, np.asarray(n_frames), notices)


def _add_window_notices(res, trajectory, notices, timeless):
    """Add the notices of one window's tracking ``res`` to ``notices``, each once, but not those on
    the errors of the window's own (biased) populations, which windows does not report, nor the one
    on an unknown time step: its (trajectory, reason) goes to ``timeless``, for one line on all."""
    from ...trajectory.assemble import error_notices

    skip = set(error_notices(res.populations, res.populations_by_type, res.conformers_by_type))
    replica = res.summary["replicas"][0]
    if not replica["time_step_known"]:
        name = os.path.basename(trajectory)
        timeless.append((name, replica["time_step_source"].partition("(")[2].rstrip(")")))
        skip.update(n for n in res.notices if n.startswith(f"{name}: time step unknown"))
    for note in res.notices:
        if note not in skip and note not in notices:
            notices.append(note)


def _time_step_notice(timeless, n_windows):
    """One line for the windows whose trajectories store no usable time step."""
    name, reason = timeless[0]
    return (f"{len(timeless)} of {n_windows} window trajectories have no usable time step (e.g. {name}: {reason}); "
            "nothing here depends on it: the windows are cut into blocks and their statistical "
            "inefficiency counted in frames, and the times recorded in the results folder are not physical.")
