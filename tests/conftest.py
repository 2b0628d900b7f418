"""Shared test helpers: small synthetic trajectories of four-site chains with chosen torsions."""

import os
import warnings

import numpy as np
import pytest

warnings.filterwarnings("ignore", category=DeprecationWarning)


@pytest.fixture(autouse=True, scope="session")
def _hash_cache(tmp_path_factory):
    """The cache of file hashes of the tests in a temporary folder, not the user's."""
    old = os.environ.get("DIHEDRA_CACHE_DIR")
    os.environ["DIHEDRA_CACHE_DIR"] = str(tmp_path_factory.mktemp("dihedra-cache"))
    yield
    if old is None:
        os.environ.pop("DIHEDRA_CACHE_DIR", None)
    else:
        os.environ["DIHEDRA_CACHE_DIR"] = old


def place_fourth(a, b, c, bond, angle_deg, torsion_deg):
    """Position of D from A, B, C, the bond C-D, the angle B-C-D and the torsion A-B-C-D (IUPAC).

    Natural extension reference frame construction (common practice); vectorised over rows.
    """
    bc = c - b
    bc /= np.linalg.norm(bc, axis=-1, keepdims=True)
    n = np.cross(b - a, bc)
    n /= np.linalg.norm(n, axis=-1, keepdims=True)
    m = np.cross(n, bc)
    theta = np.radians(angle_deg)
    phi = np.radians(torsion_deg)[..., None]
    d2 = np.concatenate([(-bond * np.cos(theta)) * np.ones_like(phi),
                         bond * np.sin(theta) * np.cos(phi),
                         bond * np.sin(theta) * np.sin(phi)], axis=-1)
    return c + d2[..., 0:1] * bc + d2[..., 1:2] * m + d2[..., 2:3] * n


def chain_coordinates(torsions_deg, spacing=8.0, bond=1.53, angle=112.0, seed=0):
    """Coordinates (n_frames, 4 * n_molecules, 3) of four-site chains with the given torsions.

    Each molecule sits at its own lattice point with a random fixed orientation.
    """
    t = np.asarray(torsions_deg, dtype=float)
    n_frames, n_mol = t.shape
    rng = np.random.default_rng(seed)
    out = np.empty((n_frames, 4 * n_mol, 3))
    side = int(np.ceil(n_mol ** (1 / 3)))
    for m in range(n_mol):
        origin = spacing * np.array([m % side, (m // side) % side, m // side**2], dtype=float)
        q, _ = np.linalg.qr(rng.normal(size=(3, 3)))
        th = np.radians(angle)
        a = np.array([bond * np.sin(th), bond * np.cos(th), 0.0]) @ q.T
        b = np.zeros(3)
        c = np.array([0.0, bond, 0.0]) @ q.T
        A = np.broadcast_to(a, (n_frames, 3)).copy()
        B = np.broadcast_to(b, (n_frames, 3)).copy()
        C = np.broadcast_to(c, (n_frames, 3)).copy()
        # torsion measured A-B-C-D with the chain A-B, B-C, C-D
        D = place_fourth(A, B, C, bond, angle, t[:, m])
        out[:, 4 * m:4 * m + 4] = np.stack([A, B, C, D], axis=1) + origin
    return out


def write_system(folder, coords, names=("C1", "C2", "C3", "C4"), resname="BUT", box=None, dt_ps=1.0,
                 stem="chains", fmt="xtc", extra_bonds=()):
    """Write a PDB topology (with CONECT bonds) and a trajectory; return their paths.

    Bonds join consecutive atoms of each residue, plus ``extra_bonds`` (pairs of indices)."""
    import MDAnalysis as mda
    from MDAnalysis.coordinates.memory import MemoryReader

    coords = np.asarray(coords, dtype=np.float32)
    n_frames, n_atoms, _ = coords.shape
    per = len(names)
    n_res = n_atoms // per
    u = mda.Universe.empty(n_atoms, n_residues=n_res, atom_resindex=np.repeat(np.arange(n_res), per),
                           trajectory=True)
    u.add_TopologyAttr("names", list(names) * n_res)
    u.add_TopologyAttr("resnames", [resname] * n_res)
    u.add_TopologyAttr("resids", np.arange(1, n_res + 1))
    u.add_TopologyAttr("elements", ["C"] * n_atoms)
    u.add_TopologyAttr("bonds", [(per * r + k, per * r + k + 1) for r in range(n_res) for k in range(per - 1)]
                       + [tuple(b) for b in extra_bonds])
    u.load_new(coords, format=MemoryReader, dt=dt_ps,
               dimensions=None if box is None else np.asarray(box, dtype=np.float32))
    top = os.path.join(folder, f"{stem}.pdb")
    traj = os.path.join(folder, f"{stem}.{fmt}")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        u.trajectory[0]
        u.atoms.write(top)
        with mda.Writer(traj, n_atoms) as w:
            for _ in u.trajectory:
                w.write(u.atoms)
    return top, traj


@pytest.fixture
def chain_system(tmp_path):
    """Factory: ``chain_system(torsions_deg, **kw) -> (topology, trajectory)``."""
    def make(torsions_deg, **kw):
        coords = chain_coordinates(torsions_deg, **{k: kw.pop(k) for k in ("spacing", "seed") if k in kw})
        return write_system(str(tmp_path), coords, **kw)
    return make
