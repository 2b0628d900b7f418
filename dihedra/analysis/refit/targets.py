r"""Targets of a torsion correction: what the reweighted ensemble should reproduce, told apart by
their columns.

``profile``
    A free-energy profile: ``angle_deg`` and ``free_energy_kj_mol`` (or ``free_energy_kcal_mol``
    / ``free_energy_kt``), optional ``free_energy_err_kj_mol`` (one standard uncertainty, same
    unit) and ``type`` (the torsion type it belongs to; without it the profile is for the one type
    corrected). A results folder, or its ``profiles.csv``, works as it is: its pooled rows (empty
    ``torsion``) of the ``histogram`` estimate where ``sampled`` is true, i.e. its reliable bins.
    The profile is compared up to a constant per type, over bins of ``bin_width_deg``: the target
    points inside a bin are averaged as Boltzmann factors, F_bin = -kT ln mean exp(-F/kT).
``populations``
    State populations: ``type``, ``state``, ``population`` and optional ``population_err``
    (fractions), the format ``dihedra compare --reference-populations`` reads
    (:mod:`dihedra.analysis.reference_populations`): ``type`` a torsion type or one torsion
    label, ``state`` a state of the run's scheme or several joined by ``|`` for their sum.
``couplings``
    Measured 3J couplings: ``torsion`` (or ``residue`` / ``label``), ``J_hz``, ``J_err_hz``, the
    format ``dihedra couplings --experimental`` reads
    (:func:`dihedra.analysis.couplings.read_experimental`); they are compared through a Karplus
    relation (``relation``), whose systematic error enters the fit's weights.

A profile from a results folder brings the folder's own state populations along when it has them
(``state_free_energies.csv``, else ``populations_by_type.csv``): :attr:`Target.states`. They are
not fitted; the refit shows them beside the sampled and reweighted populations, as a check.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ...errors import DihedraError, InputFileError
from ...units import to_kj_mol, wrap_deg
from ..couplings import read_experimental
from ..reference_populations import reference_table

#: The kinds of target.
TARGET_KINDS = ("profile", "populations", "couplings")
#: What each kind needs, as the error message for an unknown table says.
FORMATS = {
    "profile": "angle_deg, free_energy_kj_mol [, free_energy_err_kj_mol, type] (or a results folder / "
               "its profiles.csv)",
    "populations": "type, state, population [, population_err]",
    "couplings": "torsion (or residue), J_hz, J_err_hz",
}
_ENERGY_UNITS = {"kj_mol": "kJ/mol", "kcal_mol": "kcal/mol", "kt": "kT"}


@dataclass
class Target:
    """A target table in a normal form.

    Attributes
    ----------
    kind : str
        One of :data:`TARGET_KINDS`.
    table : DataFrame
        ``profile``: type (may be empty), angle_deg, free_energy_kj_mol, free_energy_err_kj_mol;
        ``populations``: type, state, population, population_err;
        ``couplings``: label, j_exp_hz, j_exp_err_hz.
    source : str or None
        The file it came from (absolute).
    notices : list of str
    states : dict or None
        A profile of a results folder: the folder's state populations, ``{"table": DataFrame
        (type, state, population, population_err), "source": path, "scheme": the scheme of its
        summary.json or None}``; None otherwise.
    """

    kind: str
    table: pd.DataFrame
    source: str | None = None
    notices: list = field(default_factory=list)
    states: dict | None = None

    @property
    def types(self):
        """Types named by a profile or populations target (labels for couplings), in order."""
        col = "label" if self.kind == "couplings" else "type"
        values = self.table[col].dropna().astype(str)
        return list(dict.fromkeys(v for v in values if v))


def _kind(columns):
    cols = {str(c).strip().lower() for c in columns}
    if "angle_deg" in cols and any(f"free_energy_{u}" in cols for u in _ENERGY_UNITS):
        return "profile"
    if {"state", "population"} <= cols:
        return "populations"
    if "j_hz" in cols or "j_exp_hz" in cols:
        return "couplings"
    return None


def _unknown(what, columns):
    formats = "; ".join(f"{k}: {v}" for k, v in FORMATS.items())
    return InputFileError(f"cannot tell what kind of target {what} is from its columns "
                          f"({', '.join(map(str, columns))}); a target is one of: {formats}.")


def read_target(target, temperature_k=None):
    """The target as a :class:`Target`, its kind told from its columns.

    Parameters
    ----------
    target : str, path, DataFrame or Target
        A CSV file, a results folder (its profiles.csv), a table, or a Target.
    temperature_k : float, optional
        Needed only for a profile in units of kT.
    """
    if isinstance(target, Target):
        return target
    if isinstance(target, pd.DataFrame):
        kind = _kind(target.columns)
        if kind is None:
            raise _unknown("the table", target.columns)
        return _normal(kind, target.copy(), None, temperature_k)
    if not isinstance(target, (str, os.PathLike)):
        raise DihedraError(f"target must be a file, a results folder or a DataFrame; got {type(target).__name__}.")
    path = os.fspath(target)
    if os.path.isdir(path):
        inner = os.path.join(path, "profiles.csv")
        if not os.path.exists(inner):
            raise InputFileError(f"the target folder {path} has no profiles.csv (run 'dihedra profile' on it, or give "
                                 "a target file).")
        path = inner
    if not os.path.exists(path):
        raise InputFileError(f"target file {path} does not exist.")
    try:
        head = pd.read_csv(path, comment="#", skipinitialspace=True, nrows=0)
    except Exception as exc:  # noqa: BLE001 - any parser error is a bad file
        raise InputFileError(f"target file {path} is not a readable CSV table: {exc}.") from None
    kind = _kind(head.columns)
    if kind is None:
        raise _unknown(path, head.columns)
    if kind == "couplings":
        table = read_experimental(path)
        chosen = "coupled_atoms" in table and (table["coupled_atoms"].astype(str).str.strip() != "").any()
        notices = list(table.attrs.get("notices", [])) + (_unread_notice(f"target file {path}", ["coupled_atoms"])
                                                          if chosen else [])
        return Target("couplings", table, os.path.abspath(path), notices)
    table = pd.read_csv(path, comment="#", skipinitialspace=True, keep_default_na=False, na_values=[""],
                        dtype={"type": str, "state": str, "torsion": str})
    out = _normal(kind, table, os.path.abspath(path), temperature_k)
    if kind == "profile" and os.path.basename(path) == "profiles.csv":
        out.states = folder_states(os.path.dirname(os.path.abspath(path)))
    return out


#: Files of a results folder with its state populations per type, in the order they are looked for.
STATE_FILES = ("state_free_energies.csv", "populations_by_type.csv")


def folder_states(folder):
    """The state populations per type of a results folder (its pooled rows: no torsion), as
    :attr:`Target.states`, or None when it has none (or they cannot be read)."""
    import json

    for name in STATE_FILES:
        path = os.path.join(folder, name)
        if not os.path.exists(path):
            continue
        try:
            table = pd.read_csv(path, keep_default_na=False, na_values=[""], dtype={"type": str, "state": str,
                                                                                    "torsion": str})
        except Exception:  # noqa: BLE001 - a damaged companion file only loses the check
            continue
        if not {"type", "state", "population"} <= set(table.columns):
            continue
        if "torsion" in table.columns:
            table = table[table["torsion"].isna() | (table["torsion"].astype(str).str.strip() == "")]
        err = table["population_err"] if "population_err" in table.columns else np.nan
        out = pd.DataFrame({"type": table["type"].astype(str), "state": table["state"].astype(str),
                            "population": pd.to_numeric(table["population"], errors="coerce"),
                            "population_err": pd.to_numeric(err, errors="coerce")})
        scheme = None
        try:
            with open(os.path.join(folder, "summary.json"), encoding="utf-8") as fh:
                scheme = json.load(fh).get("scheme")
        except (OSError, ValueError):
            pass
        return {"table": out.reset_index(drop=True), "source": path, "scheme": scheme}
    return None


def _normal(kind, table, source, temperature_k):
    table.columns = [str(c).strip() for c in table.columns]
    where = f"target file {source}" if source else "the target table"
    if kind == "profile":
        return _profile(table, where, source, temperature_k)
    if kind == "populations":
        return _populations(table, where, source)
    return _couplings(table, where, source)


def _couplings(table, where, source):
    """A table of couplings as :func:`~dihedra.analysis.couplings.read_experimental` gives it, from
    either its columns (label, j_exp_hz, j_exp_err_hz) or the file's (torsion, J_hz, J_err_hz)."""
    lower = {c.lower(): c for c in table.columns}
    label = next((lower[k] for k in ("label", "torsion", "residue") if k in lower), None)
    value = lower.get("j_exp_hz", lower.get("j_hz"))
    error = lower.get("j_exp_err_hz", lower.get("j_err_hz"))
    if label is None or value is None or error is None:
        raise InputFileError(f"{where} needs the columns torsion (or residue), J_hz and J_err_hz.")
    out = pd.DataFrame({"label": table[label].astype(str).str.strip(),
                        "j_exp_hz": pd.to_numeric(table[value], errors="coerce"),
                        "j_exp_err_hz": pd.to_numeric(table[error], errors="coerce")})
    if not (np.isfinite(out["j_exp_hz"]).all() and (out["j_exp_err_hz"] >= 0).all()):
        raise InputFileError(f"{where}: J_hz must be numbers and J_err_hz non-negative numbers.")
    unread = [str(c) for c in table.columns if c not in (label, value, error)
              and (table[c].astype(str).str.strip() != "").any()]   # (an empty column says nothing)
    return Target("couplings", out, source, _unread_notice(where, unread))


def _unread_notice(where, unread):
    """[a notice on columns of a couplings target that the refit does not read], or []."""
    return [f"{where}: column(s) {', '.join(unread)} not read by the refit: each value is fitted against the "
            "relation on its torsion's phi alone (a glycine's value against the relation of the H-alpha at phi - 60 "
            "degrees; 'dihedra couplings' chooses a glycine's row with coupled_atoms)."] if unread else []


def _populations(table, where, source):
    notices = []
    if "population_err" not in {c.lower() for c in table.columns}:
        table = table.assign(population_err=0.0)
        notices.append("the target populations have no population_err column: they were taken as exact (only "
                       "the sampling error weighs the fit).")
    return Target("populations", reference_table(table, where), source, notices)


def _profile(table, where, source, temperature_k):
    notices = []
    lower = {c.lower(): c for c in table.columns}
    suffix = next(u for u in _ENERGY_UNITS if f"free_energy_{u}" in lower)
    unit = _ENERGY_UNITS[suffix]
    if unit == "kT" and temperature_k is None:
        raise DihedraError(f"{where} gives free energies in kT; give the temperature (temperature_k / --temperature).")
    if "torsion" in lower:   # a profiles.csv: the pooled rows of one estimate, its sampled bins
        pooled = table[lower["torsion"]].isna() | (table[lower["torsion"]].astype(str).str.strip() == "")
        table = table[pooled]
    if "estimate" in lower and len(table):
        estimates = list(dict.fromkeys(table[lower["estimate"]].astype(str)))
        chosen = "histogram" if "histogram" in estimates else estimates[0]
        table = table[table[lower["estimate"]].astype(str) == chosen]
    if "sampled" in lower:
        flag = table[lower["sampled"]].astype(str).str.strip().str.lower().isin(("true", "1", "yes"))
        if (~flag).any():
            notices.append(f"{int((~flag).sum())} bin(s) of the target profile are marked unsampled; they are not "
                           "fitted.")
        table = table[flag]
    energy = pd.to_numeric(table[lower[f"free_energy_{suffix}"]], errors="coerce").to_numpy(float)
    err_col = lower.get(f"free_energy_err_{suffix}")
    err = (pd.to_numeric(table[err_col], errors="coerce").to_numpy(float) if err_col
           else np.zeros(len(table)))
    angle = pd.to_numeric(table[lower["angle_deg"]], errors="coerce").to_numpy(float)
    out = pd.DataFrame({
        "type": table[lower["type"]].astype(str).str.strip().to_numpy() if "type" in lower else "",
        "angle_deg": wrap_deg(angle), "free_energy_kj_mol": to_kj_mol(energy, unit, temperature_k),
        "free_energy_err_kj_mol": to_kj_mol(np.where(np.isfinite(err), err, 0.0), unit, temperature_k)})
    bad = ~(np.isfinite(angle) & np.isfinite(energy))
    if bad.all():
        raise InputFileError(f"{where} has no row with a number in angle_deg and free_energy_{suffix}.")
    if bad.any():
        notices.append(f"{int(bad.sum())} row(s) of the target profile without a finite angle or free energy were "
                       "left out.")
    if (out["free_energy_err_kj_mol"] < 0).any():
        raise InputFileError(f"{where}: free_energy_err_{suffix} must be non-negative.")
    return Target("profile", out[~bad].reset_index(drop=True), source, notices)


def profile_on_bins(table, edges_deg, kt):
    """A profile target on bins: (free energy, error) per bin, NaN where no target point falls.

    The points inside a bin are averaged as Boltzmann factors, F_bin = -kT ln mean exp(-F/kT)
    (a point on a bin edge counts half in each of the two bins), and their errors propagated to
    first order, sigma_bin = sqrt(sum p_i^2 sigma_i^2) / sum p_i with p_i = exp(-F_i/kT).
    """
    edges = np.asarray(edges_deg, dtype=float)
    angle = wrap_deg(table["angle_deg"].to_numpy(float))
    energy = table["free_energy_kj_mol"].to_numpy(float)
    err = table["free_energy_err_kj_mol"].to_numpy(float)
    n_bins = len(edges) - 1
    b = np.clip(np.searchsorted(edges, angle, side="left") - 1, 0, n_bins - 1)   # (lo, hi] bins
    # a point on a bin edge counts half in each bin (the trapezoid rule of a grid through the edges)
    on_edge = np.isclose(angle, edges[b + 1], rtol=0.0, atol=1e-9)
    b = np.concatenate([b, (b[on_edge] + 1) % n_bins])
    share = np.concatenate([np.where(on_edge, 0.5, 1.0), np.full(int(on_edge.sum()), 0.5)])
    energy, err = np.concatenate([energy, energy[on_edge]]), np.concatenate([err, err[on_edge]])
    p = np.exp(-(energy - energy.min()) / kt)
    total = np.bincount(b, weights=share * p, minlength=n_bins)
    count = np.bincount(b, weights=share, minlength=n_bins)
    var = np.bincount(b, weights=(share * p * err) ** 2, minlength=n_bins)
    with np.errstate(divide="ignore", invalid="ignore"):
        f = -kt * np.log(total / count) + energy.min()
        sigma = np.sqrt(var) / total
    f[count == 0] = np.nan
    sigma[count == 0] = np.nan
    return f, sigma
