"""Synthetic torsion data for the profile, scan and comparison tests (a helper, not a test).

Torsion angles are drawn *exactly* from p(phi) ~ exp(-V(phi)/kT) by inverse-CDF sampling (the CDF
integrated numerically on a 0.01 degree grid and inverted by interpolation), and written as a
trajectory of independent 4-atom molecules (united-atom butane geometry: 1.54 A bonds, 114 degree
bends) whose torsion equals each sample. DCD keeps float32 coordinates, so the angles survive to
about 1e-4 degrees.
"""

import os

import numpy as np

R_KJ_PER_MOL_K = 1.380649e-23 * 6.02214076e23 / 1000.0  # CODATA 2018 (exact), independent of dihedra
#: Ryckaert & Bellemans, Faraday Discuss. Chem. Soc. 66 (1978) 95: butane, C0..C5 in kJ/mol (the
#: values as commonly quoted, from memory; not re-checked against the paper).
RB_BUTANE = (9.28, 12.16, -13.12, -3.06, 26.24, -31.5)


def rb_energy(phi_deg, coefficients=RB_BUTANE):
    """Ryckaert-Bellemans energy (kJ/mol), psi = phi - 180 deg."""
    c = np.cos(np.radians(np.asarray(phi_deg, dtype=float) - 180.0))
    return sum(k * c ** n for n, k in enumerate(coefficients))


def threefold_energy(phi_deg, barrier_kj_mol=12.0):
    """Ethane-like rotor V = (B/2)(1 + cos 3 phi): staggered minima at 60, 180, -60, barrier B."""
    return 0.5 * barrier_kj_mol * (1.0 + np.cos(3.0 * np.radians(np.asarray(phi_deg, dtype=float))))


def inverse_cdf_samples(energy, temperature_k, size, rng):
    """Angles (degrees, (-180, 180]) distributed as exp(-energy(phi)/kT)."""
    kt = R_KJ_PER_MOL_K * temperature_k
    grid = np.linspace(-180.0, 180.0, 36001)
    w = np.exp(-(energy(grid) - energy(grid).min()) / kt)
    cdf = np.concatenate([[0.0], np.cumsum(0.5 * (w[1:] + w[:-1]) * np.diff(grid))])
    cdf /= cdf[-1]
    phi = np.interp(rng.random(size), cdf, grid)
    return np.where(phi <= -180.0, 180.0, phi)


def chain_xyz(phi_deg, bond=1.54, bend_deg=114.0):
    """Coordinates (n, 4, 3) of 4-site chains with torsion angles ``phi_deg`` (IUPAC sign)."""
    phi = np.radians(np.asarray(phi_deg, dtype=float))
    t = np.radians(bend_deg)
    n = phi.size
    xyz = np.zeros((n, 4, 3))
    xyz[:, 1] = [bond, 0, 0]
    xyz[:, 2] = xyz[:, 1] + bond * np.array([-np.cos(t), np.sin(t), 0.0])
    # D from C along the local frame: bc = C-B, n = (B-A) x bc, m = n x bc
    b, c = xyz[:, 1], xyz[:, 2]
    bc = (c - b) / np.linalg.norm(c - b, axis=1)[:, None]
    nrm = np.cross(b - xyz[:, 0], bc)
    nrm /= np.linalg.norm(nrm, axis=1)[:, None]
    m = np.cross(nrm, bc)
    local = bond * np.stack([-np.cos(t) * np.ones(n), np.sin(t) * np.cos(phi), np.sin(t) * np.sin(phi)], 1)
    xyz[:, 3] = c + local[:, :1] * bc + local[:, 1:2] * m + local[:, 2:3] * nrm
    return xyz


def write_rotor_trajectory(folder, name, angles, spacing=8.0):
    """Write ``name``.pdb (with CONECT bonds) and ``name``.dcd of molecules with the given torsions.

    ``angles`` is (n_frames, n_molecules) degrees. Returns (pdb, dcd) paths.
    """
    import warnings

    import MDAnalysis as mda

    angles = np.asarray(angles, dtype=float)
    n_frames, n_mol = angles.shape
    n_atoms = 4 * n_mol
    u = mda.Universe.empty(n_atoms, n_residues=n_mol, atom_resindex=np.repeat(np.arange(n_mol), 4),
                           trajectory=True)
    u.add_TopologyAttr("names", ["C1", "C2", "C3", "C4"] * n_mol)
    u.add_TopologyAttr("types", ["C"] * n_atoms)
    u.add_TopologyAttr("elements", ["C"] * n_atoms)
    u.add_TopologyAttr("resnames", ["BUT"] * n_mol)
    u.add_TopologyAttr("resids", np.arange(1, n_mol + 1))
    u.add_TopologyAttr("masses", [15.035, 14.027, 14.027, 15.035] * n_mol)
    u.add_TopologyAttr("bonds", [(4 * m + k, 4 * m + k + 1) for m in range(n_mol) for k in range(3)])
    side = int(np.ceil(n_mol ** (1 / 3)))
    grid = np.array([(i, j, k) for i in range(side) for j in range(side) for k in range(side)])[:n_mol]
    offsets = (grid * spacing)[:, None, :]
    pdb = os.path.join(folder, name + ".pdb")
    dcd = os.path.join(folder, name + ".dcd")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        u.atoms.positions = (chain_xyz(angles[0]) + offsets).reshape(-1, 3)
        u.atoms.write(pdb, bonds="conect")
        with mda.Writer(dcd, n_atoms) as w:
            for f in range(n_frames):
                u.atoms.positions = (chain_xyz(angles[f]) + offsets).reshape(-1, 3)
                w.write(u.atoms)
    return pdb, dcd


def rotor_results(tmp_path, energy, temperature_k=298.15, n_frames=2000, n_molecules=100, seed=7,
                  name="rotor", keep_angles=False, record_temperature=True):
    """Track a synthetic rotor trajectory; returns the loaded results folder."""
    from dihedra.io.resultsdir import load_results
    from dihedra.tracking import track

    rng = np.random.default_rng(seed)
    angles = inverse_cdf_samples(energy, temperature_k, (n_frames, n_molecules), rng)
    pdb, dcd = write_rotor_trajectory(str(tmp_path), name, angles)
    out = os.path.join(str(tmp_path), name + "-results")
    track(pdb, [dcd], torsions="rotatable", scheme="anti-gauche", out=out, keep_angles=keep_angles,
          temperature_k=temperature_k if record_temperature else None)
    return load_results(out)


#: The simulated united-atom RB butane of example_trajectories (made by make_examples.py), if present.
EXAMPLE_BUTANE = os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))),
                              "example_trajectories", "butane_rb")
EXAMPLE_TEMPERATURE_K = 298.15  # make_examples.py default


def butane_results(tmp_path):
    """Tracked RB butane: the simulated example when it exists, else exact synthetic samples.

    Returns (results, description).
    """
    from dihedra.io.resultsdir import load_results
    from dihedra.tracking import track

    if os.path.exists(EXAMPLE_BUTANE + ".pdb") and os.path.exists(EXAMPLE_BUTANE + ".xtc"):
        out = os.path.join(str(tmp_path), "butane-example")
        track(EXAMPLE_BUTANE + ".pdb", [EXAMPLE_BUTANE + ".xtc"], torsions="rotatable", out=out,
              temperature_k=EXAMPLE_TEMPERATURE_K)
        return load_results(out), "simulated example butane_rb.pdb/.xtc"
    return (rotor_results(tmp_path, rb_energy, EXAMPLE_TEMPERATURE_K, n_frames=2000, n_molecules=100,
                          seed=11, name="butane"), "synthetic inverse-CDF RB butane")
