r"""The rows of the profile tables (:func:`~dihedra.analysis.profiles.driver.free_energy_profiles`), stack by stack.

:func:`_stack_tables` turns one stack of profiles (histogram, kernel and state free energies of
some torsions or types) into the columns of the four tables; :class:`_ProfileTables` collects them
(:class:`_Columns`: column arrays joined once, or written into arrays reserved for the whole table).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from .estimation import bin_centres
from .features import BARRIER_FIELDS, MINIMUM_FIELDS, _features_stack


class _Columns:
    """Column arrays of a table collected piece by piece, joined once at the end; or, for a table
    whose length is known (:meth:`reserve`), written into its final arrays as the pieces come."""

    def __init__(self, columns):
        self.columns = list(columns)
        self.parts = {c: [] for c in self.columns}
        self.reserved = None   # (rows, {column: dtype}) until the first piece
        self.filled = None     # {column: array of the whole table}
        self.at = 0

    def reserve(self, n_rows, dtypes):
        """Make the table ``n_rows`` long in final arrays (made when the first piece comes, in
        its types, or those of ``dtypes`` by column): no pieces are kept and no column is joined,
        so the table is in memory once (the profiles of 15,000 torsions are 6.5 million rows,
        pieces of which took the heap's freed memory for good)."""
        self.reserved = (int(n_rows), dict(dtypes))

    def add(self, **values):
        n = max(np.size(v) for v in values.values())
        if self.reserved is not None and self.filled is None:
            rows, dtypes = self.reserved
            self.filled = {c: np.empty(rows, dtype=dtypes.get(c, np.asarray(values[c]).dtype)) for c in self.columns}
        for c in self.columns:
            v = np.broadcast_to(np.asarray(values[c]), (n,)) if np.ndim(values[c]) == 0 \
                else np.asarray(values[c]).ravel()
            if self.filled is not None:
                self.filled[c][self.at:self.at + n] = v
            else:
                self.parts[c].append(v)
        self.at += n

    def frame(self, categories):
        """DataFrame; the columns named in ``categories`` hold codes into those category lists.

        The pieces of a column are let go as soon as it is joined, and the DataFrame takes the
        joined arrays as they are (``copy=False``: pandas would otherwise copy every float column
        into one 2-D block): the profiles of 15,000 torsions are 6.5 million rows, about 0.6 GB
        of columns, which were held three times over at the peak."""
        data = {}
        if self.filled is not None and self.at != len(self.filled[self.columns[0]]):
            raise RuntimeError(f"{self.at} rows given for a table of {len(self.filled[self.columns[0]])}")
        for c in self.columns:
            parts = self.parts.pop(c, [])
            joined = self.filled.pop(c) if self.filled is not None else \
                (np.concatenate(parts) if parts else np.zeros(0))
            del parts
            if c in categories:
                codes = joined if joined.dtype.kind in "iu" else joined.astype(np.int64)
                data[c] = pd.Categorical.from_codes(codes, categories=categories[c])
            else:
                data[c] = joined
        self.parts = {c: [] for c in self.columns}
        self.reserved = self.filled = None
        self.at = 0
        return pd.DataFrame(data, columns=self.columns, copy=False)


PROFILE_COLUMNS = ["type", "torsion", "estimate", "angle_deg", "probability_density_per_deg", "free_energy_kj_mol",
                   "free_energy_err_kj_mol", "sampled", "n_samples", "bandwidth_deg"]
MINIMA_COLUMNS = ["type", "torsion", "minimum", *MINIMUM_FIELDS]
BARRIER_COLUMNS = ["type", "torsion", "barrier", *BARRIER_FIELDS]
STATE_DG_COLUMNS = ["type", "torsion", "state", "reference_state", "population", "population_err",
                    "free_energy_kj_mol", "free_energy_err_kj_mol"]


def _stack_tables(type_code, torsion_code, hist, kernel, states, kt):
    """Rows of the four tables for one stack of profiles (a pure function: stacks run in threads).

    ``type_code``/``torsion_code`` (m,) index the type and torsion names (0 = pooled); ``hist`` is
    the histogram Profile1D stack, ``kernel`` the output of :func:`_kernel_columns` and ``states``
    that of :func:`_state_free_energy_stack`. Returns {table: {column: array}}.
    """
    bws, smooth, density, free, err, ok = kernel
    m, nh = hist.samples.shape
    nk = smooth.shape[1]
    width = nh + nk

    def join(h, k):
        return np.concatenate([np.broadcast_to(h, (m, nh)), np.broadcast_to(k, (m, nk))], axis=1)

    profiles = dict(type=np.repeat(type_code, width), torsion=np.repeat(torsion_code, width),
                    estimate=np.tile(np.repeat([0, 1], [nh, nk]), m),
                    angle_deg=np.tile(np.r_[hist.angle_deg, bin_centres(nk)], m),
                    probability_density_per_deg=join(hist.density_per_deg, density),
                    free_energy_kj_mol=join(hist.free_energy_kj_mol, free),
                    free_energy_err_kj_mol=join(np.where(hist.sampled, hist.free_energy_err_kj_mol, np.nan), err),
                    sampled=join(hist.sampled, ok), n_samples=join(hist.samples, smooth),
                    bandwidth_deg=join(np.nan, np.asarray(bws, dtype=float)[:, None]))
    minima, barriers = _features_stack(hist, kt)
    has = np.flatnonzero(states["has"])
    n_states = states["population"].shape[1]
    return {"profiles": profiles,
            "minima": dict(type=type_code[minima["row"]], torsion=torsion_code[minima["row"]],
                           minimum=minima["number"], **{f: minima[f] for f in MINIMUM_FIELDS}),
            "barriers": dict(type=type_code[barriers["row"]], torsion=torsion_code[barriers["row"]],
                             barrier=barriers["number"], **{f: barriers[f] for f in BARRIER_FIELDS}),
            "dg": dict(type=np.repeat(type_code[has], n_states), torsion=np.repeat(torsion_code[has], n_states),
                       state=np.tile(np.arange(n_states), len(has)),
                       reference_state=np.repeat(states["reference"][has], n_states),
                       **{c: states[c][has] for c in ("population", "population_err", "free_energy_kj_mol",
                                                         "free_energy_err_kj_mol")})}


class _ProfileTables:
    """The four tables of :func:`free_energy_profiles`, filled stack by stack."""

    def __init__(self):
        self.tables = {"profiles": _Columns(PROFILE_COLUMNS), "minima": _Columns(MINIMA_COLUMNS),
                       "barriers": _Columns(BARRIER_COLUMNS), "dg": _Columns(STATE_DG_COLUMNS)}

    def add(self, parts):
        """Append the rows of one stack (from :func:`_stack_tables`)."""
        for name, columns in parts.items():
            self.tables[name].add(**columns)

    def frames(self, types, labels, state_labels):
        torsion = [""] + list(labels)
        cats = {"type": list(types), "torsion": torsion}
        t = self.tables
        return (t["profiles"].frame({**cats, "estimate": ["histogram", "kernel"]}), t["minima"].frame(cats),
                t["barriers"].frame(cats),
                t["dg"].frame({**cats, "state": list(state_labels), "reference_state": list(state_labels)}))


def _flat(cols):
    """The columns of one table of a stack as flat arrays of one length (as :meth:`_Columns.add` takes them)."""
    n = max(np.size(v) for v in cols.values())
    return {c: np.broadcast_to(np.asarray(v), (n,)) if np.ndim(v) == 0 else np.asarray(v).ravel()
            for c, v in cols.items()}


def _recoded(rows, torsion_of_type):
    """The rows of the types in ``torsion_of_type`` ({type code: torsion code}) as rows of those
    torsions (a torsion alone in its type has the type's profile)."""
    out = {}
    for name, cols in rows.items():
        cols = _flat(cols)
        sel = np.isin(cols["type"], list(torsion_of_type))
        out[name] = {c: v[sel] for c, v in cols.items()}
        out[name]["torsion"] = np.array([torsion_of_type[t] for t in out[name]["type"]], dtype=np.int64)
    return out


def _replaced(rows, other, torsions):
    """``rows`` of a stack with those of the torsion codes ``torsions`` taken from ``other`` instead,
    in torsion order (the rows of each torsion in their own order)."""
    out = {}
    for name, cols in rows.items():
        cols = _flat(cols)
        keep = ~np.isin(cols["torsion"], torsions)
        take = np.isin(other[name]["torsion"], torsions)
        order = np.argsort(np.concatenate([cols["torsion"][keep], other[name]["torsion"][take]]), kind="stable")
        out[name] = {c: np.concatenate([v[keep], other[name][c][take]])[order] for c, v in cols.items()}
    return out
