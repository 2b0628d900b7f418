"""Ramachandran regions: the backbone state of each residue from its (phi, psi) pair.

Why a table of its own
----------------------
A state scheme cuts one torsion's circle; a residue's backbone conformation is a point in the
(phi, psi) plane, and its published regions are rectangles there, not products of one state of
phi and one of psi. So the regions are computed per residue and frame from the angle time series
(``track --keep-angles``), counted in the same blocks as the populations (blocks never span two
replicas) and reported like them: per residue with a blocking standard error
(:func:`dihedra.numerics.populations.torsion_populations`), and pooled per residue type with the
heterogeneity between residues (:func:`dihedra.numerics.populations.pool_by_type`).

Regions (degrees; Beauchamp, Lin, Das & Pande, J. Chem. Theory Comput. 8 (2012) 1409, as
recalled, from memory), each open at its ends:

============  ====================  ==========================
region        phi                   psi
============  ====================  ==========================
``alpha-R``   -160 .. -20           -120 .. 50
``beta``      -180 .. -90           50 .. 240 (psi > 50 or < -120)
``PPII``      -90 .. -20            50 .. 240
``alpha-L``   0 .. 180              -100 .. 100
``other``     everything else
============  ====================  ==========================

Example
-------
>>> region_codes([-60.0, -120.0, -75.0, 60.0, 60.0], [-45.0, 130.0, 145.0, 40.0, 180.0]).tolist()
[0, 1, 2, 3, 4]
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..errors import DihedraError
from ..numerics.populations import heterogeneity_notice, pool_by_type, torsion_populations
from ..trajectory.result import as_result

#: Region labels, in code order.
REGIONS = ("alpha-R", "beta", "PPII", "alpha-L", "other")
#: (phi_lo, phi_hi, psi_lo, psi_hi) of each region but ``other``; psi ranges above 180 wrap.
REGION_BOUNDS = {"alpha-R": (-160.0, -20.0, -120.0, 50.0), "beta": (-180.0, -90.0, 50.0, 240.0),
                 "PPII": (-90.0, -20.0, 50.0, 240.0), "alpha-L": (0.0, 180.0, -100.0, 100.0)}
#: Blocks per replica for the errors (as the populations of ``track``).
N_BLOCKS = 64


def region_codes(phi, psi):
    """Region code (index into :data:`REGIONS`) of each (phi, psi) pair in degrees; -1 where an
    angle is undefined (NaN)."""
    phi = np.asarray(phi, dtype=float)
    psi = np.asarray(psi, dtype=float)
    codes = np.full(np.broadcast(phi, psi).shape, len(REGIONS) - 1, dtype=np.int8)
    for k, name in enumerate(REGIONS[:-1]):
        f0, f1, s0, s1 = REGION_BOUNDS[name]
        # psi measured upwards from s0, so that 50 .. 240 wraps through 180
        rel = np.mod(psi - s0, 360.0)
        inside = (phi > f0) & (phi < f1) & (rel > 0) & (rel < s1 - s0) & (codes == len(REGIONS) - 1)
        codes[inside] = k
    codes[np.isnan(phi) | np.isnan(psi)] = -1
    return codes


@dataclass
class RamachandranResult:
    """Result of :func:`ramachandran_regions`.

    Attributes
    ----------
    regions : DataFrame
        Per residue and region: ``residue`` (the group, e.g. ``ALA12``), ``type`` (residue type),
        ``region``, ``population``, ``population_err``, ``n_effective``, ``n_samples``.
    regions_by_type : DataFrame
        Pooled per residue type, with the heterogeneity columns of pooled populations.
    notices : list of str
    parameters : dict
    """

    regions: pd.DataFrame
    regions_by_type: pd.DataFrame
    notices: list = field(default_factory=list)
    parameters: dict = field(default_factory=dict)

    def save(self, folder):
        """Write ``ramachandran.csv``, ``ramachandran_by_type.csv`` and ``ramachandran.json``."""
        from ..io.outputs import file_set
        from ..io.tables import write_json, write_table

        with file_set(folder):   # (all three or none replaced)
            return [write_table(self.regions, folder, "ramachandran.csv"),
                    write_table(self.regions_by_type, folder, "ramachandran_by_type.csv"),
                    write_json({"parameters": self.parameters, "notices": list(self.notices)}, folder,
                               "ramachandran.json")]


def _pairs(torsions):
    """(group, residue type, phi label, psi label) of every residue that has both."""
    t = torsions
    phi = t[t["name"] == "phi"].set_index("group")
    psi = t[t["name"] == "psi"].set_index("group")
    both = [g for g in phi.index if g in psi.index]
    return [(g, str(phi.loc[g, "type"]).partition(":")[0], str(phi.loc[g, "torsion"]), str(psi.loc[g, "torsion"]))
            for g in both]


def ramachandran_regions(result, *, batch_frames=None):
    """Populations of the Ramachandran regions of every residue, and pooled per residue type.

    Parameters
    ----------
    result : TrackResult or TorsionStates
        A tracking result with protein phi and psi torsions and their angle time series
        (``track --torsions protein-backbone --keep-angles``).
    batch_frames : int, optional
        Frames read at a time.

    Returns
    -------
    RamachandranResult

    References
    ----------
    Beauchamp, Lin, Das & Pande, J. Chem. Theory Comput. 8 (2012) 1409 (the region bounds).
    """
    result = as_result(result)
    pairs = _pairs(result.torsions)
    if not pairs:
        raise DihedraError("no residue has both a phi and a psi torsion in this result; track with "
                           "--torsions protein-backbone.")
    if not result.has_series("angles"):
        raise DihedraError("Ramachandran regions need the angle time series: track with --keep-angles "
                           "(keep_angles=True).")
    frames = [int(r["frames_analysed"]) for r in result.summary["replicas"]]
    n_blocks = [min(N_BLOCKS, f) for f in frames]
    offsets = np.concatenate([[0], np.cumsum(n_blocks)])
    counts = np.zeros((int(offsets[-1]), len(pairs), len(REGIONS)))
    columns = [c for _, _, a, b in pairs for c in (a, b)]
    for chunk in result.iter_chunks("angles", columns, batch_frames):
        codes = region_codes(chunk.values[0::2], chunk.values[1::2])          # (residues, frames)
        pos = chunk.first + np.arange(codes.shape[1])
        block = offsets[chunk.replica] + pos * n_blocks[chunk.replica] // frames[chunk.replica]
        w = np.ones(codes.shape[1]) if chunk.weight is None else chunk.weight
        for k in range(len(REGIONS)):
            hit = codes == k
            np.add.at(counts[:, :, k], (np.broadcast_to(block, hit.shape)[hit], np.nonzero(hit)[0]),
                      np.broadcast_to(w, hit.shape)[hit])
    block_replica = np.repeat(np.arange(len(frames)), n_blocks)
    per = torsion_populations(counts, block_replica, [p[0] for p in pairs], [p[1] for p in pairs], REGIONS)
    per = per.rename(columns={"torsion": "residue", "state": "region"})
    pooled = pool_by_type(per.rename(columns={"region": "state"}), key="type", item="residue",
                          count_name="n_residues").rename(columns={"state": "region"})
    notices = []
    note = heterogeneity_notice(pooled, "type", "residue types")
    if note:
        notices.append(note.replace("torsions", "residues"))
    if per["population_err"].isna().any():
        notices.append("some residues have no error estimate (fewer than two blocks of frames, e.g. a single "
                       "frame): n/a.")
    return RamachandranResult(regions=per, regions_by_type=pooled, notices=notices,
                              parameters={"regions_deg": {k: list(v) for k, v in REGION_BOUNDS.items()},
                                          "source": "Beauchamp, Lin, Das & Pande, J. Chem. Theory Comput. 8 "
                                                    "(2012) 1409 (as recalled)",
                                          "n_residues": len(pairs), "folder": result.folder and os.fspath(result.folder)})
