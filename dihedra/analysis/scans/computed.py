r"""Computed relaxed torsion scans (``pip install "dihedra[scan]"``).

* :func:`mmff94_scan` -- relaxed MMFF94 scan with RDKit (MMFF94: Halgren, J. Comput. Chem. 17
  (1996) 490): at each angle (every 10 degrees by default) the torsion is set, then the whole
  molecule optimised with the torsion held by an MMFF torsion constraint; the energy is the
  unconstrained MMFF94 energy at the optimised geometry. The circle is swept forwards and
  backwards and the lower energy kept at each angle (against hysteresis).
* :func:`xtb_scan` -- relaxed GFN2-xTB scan with tblite (GFN2-xTB: Bannwarth, Ehlert & Grimme,
  J. Chem. Theory Comput. 15 (2019) 1652): a harmonic restraint on the torsion
  (k = :data:`XTB_RESTRAINT_KJ_MOL_RAD2`) added to the GFN2-xTB energy, minimised with scipy's
  L-BFGS-B on tblite energies and gradients (stopped when no gradient component exceeds
  :data:`XTB_GRADIENT_TOLERANCE`); the energy written is GFN2-xTB alone, the angle the one reached.
  Each point records its largest remaining gradient component and the energy change of its last
  step; for a molecule that is its own mirror image, E(phi) = E(-phi) holds exactly and the scan
  records its largest departure from it (the mirror asymmetry), a measure of what the relaxation
  left undone.

Both take the molecule the torsion belongs to, built from a topology with elements and hydrogens
(:func:`molecule_from_topology`, first frame); the scan is written as a reusable scan CSV with the
method in its metadata by :func:`dihedra.analysis.scans.files.write_scan_csv`.
"""

from __future__ import annotations

import numpy as np

from ...errors import DihedraError
from ...units import HARTREE_KJ_PER_MOL, wrap_deg
from .scan import scan_from_points

#: Harmonic restraint on the torsion in the GFN2-xTB scan, kJ/(mol rad^2).
XTB_RESTRAINT_KJ_MOL_RAD2 = 5000.0
#: L-BFGS-B gradient tolerance of the GFN2-xTB scan (largest component, hartree/bohr). On butane
#: (every 30 degrees) 1e-3 leaves E(phi) and E(-phi) 0.48 kJ/mol apart and the energies up to 0.56 kJ/mol
#: from a scan at 1e-5, 3e-4 still 0.17 kJ/mol; 1e-4 brings every energy within 0.03 kJ/mol of it
#: for 3 times the energy evaluations of 1e-3 (1e-5: 4.5 times).
XTB_GRADIENT_TOLERANCE = 1e-4
#: L-BFGS-B's relative energy criterion, set so small that the gradient tolerance (or the iteration
#: limit) decides when a point is relaxed: scipy's default (2.2e-9 relative, 8e-5 kJ/mol on butane)
#: stopped points with gradients above 1e-4 hartree/bohr.
_XTB_NO_ENERGY_STOP = 1e-14
#: Random restarts per MMFF94 scan point, and their displacement (angstrom, Gaussian per coordinate).
KICKS = 2
KICK_ANGSTROM = 0.05
#: Bohr radius in angstrom (CODATA 2018).
BOHR_ANGSTROM = 0.529177210903
_INSTALL = 'install the scan extras: pip install "dihedra[scan]"'


def _require(module, what):
    import importlib
    try:
        return importlib.import_module(module)
    except ImportError:
        raise DihedraError(f"{what} needs the package {module.split('.')[0]}; {_INSTALL}.") from None


def parse_torsion_atoms(spec):
    """Four 0-based atom indices from ``"A,B,C,D"`` (or a sequence)."""
    parts = spec.split(",") if isinstance(spec, str) else list(spec)
    try:
        idx = tuple(int(str(p).strip()) for p in parts)
    except ValueError:
        idx = ()
    if len(idx) != 4 or len(set(idx)) != 4 or min(idx) < 0:
        raise DihedraError(f"a torsion is four different 0-based atom indices A,B,C,D; got {spec!r}.")
    return idx


def molecule_from_topology(topology, torsion, trajectory=None):
    """The RDKit molecule (with 3-D coordinates of the first frame) that holds a torsion.

    Parameters
    ----------
    topology : str
        Topology with elements (or element-like atom types) and explicit hydrogens, and bonds
        (guessed from distances if absent).
    torsion : str or sequence of 4 int
        0-based atom indices A,B,C,D of the topology.
    trajectory : str, optional
        The first frame of this trajectory gives the coordinates (else the topology's).

    Returns
    -------
    mol : rdkit.Chem.Mol
    local : tuple of 4 int
        The torsion's atom indices inside ``mol``.
    """
    _require("rdkit", "building the molecule for a computed scan")
    from ...trajectory.inputs import load_universe

    idx = parse_torsion_atoms(torsion)
    notices = []
    u = load_universe(topology, trajectory, notices)
    if max(idx) >= u.atoms.n_atoms:
        raise DihedraError(f"torsion atoms {idx} do not exist: {topology} has {u.atoms.n_atoms} atoms "
                           f"(indices 0..{u.atoms.n_atoms - 1}).")
    if not hasattr(u.atoms, "elements") or not all(str(e).strip() for e in u.atoms.elements):
        raise DihedraError(f"{topology} gives no chemical elements; a computed scan needs an all-atom "
                           "topology with elements (e.g. a PDB with element columns, a PSF or TPR).")
    try:
        _ = u.bonds
        has_bonds = len(u.bonds) > 0
    except Exception:  # noqa: BLE001 - no bond attribute
        has_bonds = False
    if not has_bonds:
        u.guess_TopologyAttrs(to_guess=["bonds"])
    frag = u.atoms[idx[0]].fragment
    missing = [i for i in idx if i not in set(frag.indices)]
    if missing:
        raise DihedraError(f"atoms {idx} are not all in one molecule (atom {missing[0]} is not bonded to "
                           f"atom {idx[0]}); check the torsion.")
    if not any(str(e).upper() == "H" for e in frag.elements) and frag.n_atoms > 1:
        raise DihedraError(f"the molecule holding torsion {idx} ({frag.n_atoms} atoms) has no hydrogens; "
                           "MMFF94 and GFN2-xTB need every hydrogen explicit (a united-atom model cannot be "
                           "scanned this way; supply a scan file instead).")
    try:
        import warnings
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            mol = frag.convert_to("RDKIT")
    except Exception as exc:  # noqa: BLE001 - report the converter's reason
        raise DihedraError(f"cannot build the molecule of torsion {idx} for RDKit: {exc}.") from None
    position = {int(a.GetIntProp("_MDAnalysis_index")): a.GetIdx() for a in mol.GetAtoms()}
    local = tuple(position[i] for i in idx)
    _check_rotatable(mol, local)
    return mol, local


def _check_rotatable(mol, local):
    a, b, c, d = local
    for x, y in ((a, b), (b, c), (c, d)):
        if mol.GetBondBetweenAtoms(int(x), int(y)) is None:
            raise DihedraError(f"atoms {x} and {y} of the torsion are not bonded; A-B, B-C and C-D must be bonds.")
    if mol.GetBondBetweenAtoms(int(b), int(c)).IsInRing():
        raise DihedraError("the central bond of the torsion is in a ring; a scan cannot turn it freely.")


def scan_angles(step_deg):
    """The angles of a scan every ``step_deg`` degrees (a divisor of 360, at most 60), or the error."""
    step = float(step_deg)
    if not (0 < step <= 60) or abs(360.0 / step - round(360.0 / step)) > 1e-9:
        raise DihedraError(f"the scan step must divide 360 and be at most 60 degrees (e.g. 10, 15, 30); got "
                           f"{step_deg!r}.")
    return wrap_deg(-180.0 + step * np.arange(1, int(round(360.0 / step)) + 1))


def _sweep_order(targets, start_deg):
    """Targets ordered from the one nearest ``start_deg`` upwards, then downwards."""
    k0 = int(np.argmin(np.abs((targets - start_deg + 180.0) % 360.0 - 180.0)))
    up = [targets[(k0 + k) % len(targets)] for k in range(len(targets))]
    down = [targets[(k0 - k) % len(targets)] for k in range(len(targets))]
    return up, down


def _relax_mmff_point(work, props, torsion, target, rng, max_iterations):
    """Optimise ``work`` (its conformer set to the target angle) with the torsion held at
    ``target`` by an MMFF torsion constraint, from where it is and after :data:`KICKS` random
    displacements; leave the lowest geometry in the conformer and return its unconstrained
    MMFF94 energy in kJ/mol."""
    from rdkit.Chem import AllChem
    from rdkit.Geometry import Point3D

    a, b, c, d = torsion
    conf = work.GetConformer()
    energy, kept = None, None
    for kick in range(1 + KICKS):
        if kick:  # a small random displacement lets the optimiser leave a saddle point
            pos = np.asarray(kept) + rng.normal(0.0, KICK_ANGSTROM, np.shape(kept))
            for j in range(len(pos)):
                conf.SetAtomPosition(j, Point3D(*pos[j]))
        ff = AllChem.MMFFGetMoleculeForceField(work, props)
        ff.MMFFAddTorsionConstraint(a, b, c, d, False, target, target, 1.0e4)
        for _ in range(20):
            if ff.Minimize(maxIts=max_iterations, forceTol=1e-6, energyTol=1e-10) == 0:
                break
        e = float(AllChem.MMFFGetMoleculeForceField(work, props).CalcEnergy()) * 4.184
        if energy is None or e < energy:
            energy, kept = e, conf.GetPositions()
    for j in range(len(kept)):
        conf.SetAtomPosition(j, Point3D(*kept[j]))
    return energy


def mmff94_scan(mol, torsion, step_deg=10.0, max_iterations=5000, progress=None):
    """Relaxed MMFF94 scan of a torsion of an RDKit molecule with 3-D coordinates.

    Parameters
    ----------
    mol : rdkit.Chem.Mol
        With explicit hydrogens and one conformer.
    torsion : sequence of 4 int
        Atom indices in ``mol``.
    step_deg : float
        Spacing of the scan (must divide 360).
    progress : callable, optional
        Called as ``progress(done, total, angle_deg, energy_kj_mol)``.

    Returns
    -------
    TorsionScan (kind ``relaxed``; metadata with the method and the angles reached)
    """
    _require("rdkit", "an MMFF94 scan")
    from rdkit import Chem
    from rdkit.Chem import AllChem, rdMolTransforms

    rng = np.random.default_rng(0)
    a, b, c, d = (int(i) for i in torsion)
    _check_rotatable(mol, (a, b, c, d))
    if mol.GetNumConformers() == 0:
        raise DihedraError("the molecule has no 3-D coordinates; embed it first (AllChem.EmbedMolecule).")
    work = Chem.Mol(mol)
    props = AllChem.MMFFGetMoleculeProperties(work, mmffVariant="MMFF94")
    if props is None:
        raise DihedraError("MMFF94 has no parameters for this molecule (check elements, charges and hydrogens).")
    plain = AllChem.MMFFGetMoleculeForceField(work, props)
    plain.Minimize(maxIts=max_iterations)
    start = Chem.Conformer(work.GetConformer())
    targets = scan_angles(step_deg)
    best = {}
    total = 3 * len(targets)
    done = 0
    up, down = _sweep_order(targets, rdMolTransforms.GetDihedralDeg(start, a, b, c, d))
    conf = work.GetConformer()
    for sweep, fresh in ((up, True), (up, False), (down, False)):
        for j in range(work.GetNumAtoms()):
            conf.SetAtomPosition(j, start.GetAtomPosition(j))
        for target in sweep:
            if fresh:
                for j in range(work.GetNumAtoms()):
                    conf.SetAtomPosition(j, start.GetAtomPosition(j))
            rdMolTransforms.SetDihedralDeg(conf, a, b, c, d, float(target))
            energy = _relax_mmff_point(work, props, (a, b, c, d), float(target), rng, max_iterations)
            reached = rdMolTransforms.GetDihedralDeg(conf, a, b, c, d)
            key = float(target)
            if key not in best or energy < best[key][0]:
                best[key] = (energy, reached)
            done += 1
            if progress is not None:
                progress(done, total, key, energy)
    angles = np.array(sorted(best))
    energy = np.array([best[x][0] for x in angles])
    meta = {"method": f"MMFF94 relaxed scan (RDKit {_version('rdkit')}), torsion constraint 1e4 kcal/(mol rad^2), "
                      "each angle from the start geometry and from both neighbours, 2 random restarts each, lowest "
                      "energy kept",
            "kind": "relaxed", "step_deg": float(step_deg),
            "reached_angle_deg": {f"{x:g}": round(float(best[x][1]), 3) for x in angles}}
    return scan_from_points(angles, energy, kind="relaxed", source="MMFF94", metadata=meta)


def _dihedral_deg(x, a, b, c, d):
    b1, b2, b3 = x[b] - x[a], x[c] - x[b], x[d] - x[c]
    n1, n2 = np.cross(b1, b2), np.cross(b2, b3)
    y = np.dot(np.cross(n1, n2), b2) / np.linalg.norm(b2)
    return np.degrees(np.arctan2(y, np.dot(n1, n2)))


class _RestrainedEnergy:
    """GFN2-xTB energy and gradient (tblite, hartree and hartree/bohr) plus the harmonic restraint
    k/2 (phi - phi0)^2 on the torsion, as ``(energy, gradient)`` of flat coordinates in bohr."""

    def __init__(self, calc, torsion, k_eh):
        self.calc, self.torsion, self.k_eh = calc, tuple(torsion), k_eh
        self.res = None

    def __call__(self, x, target):
        a, b, c, d = self.torsion
        k_eh = self.k_eh
        pos = x.reshape(-1, 3)
        self.calc.update(pos)
        try:
            self.res = self.calc.singlepoint(self.res)
        except RuntimeError:
            self.res = self.calc.singlepoint()
        e = float(self.res.get("energy"))
        g = np.array(self.res.get("gradient"), dtype=float)
        dev = np.radians((_dihedral_deg(pos, a, b, c, d) - target + 180.0) % 360.0 - 180.0)
        e += 0.5 * k_eh * dev ** 2
        # gradient of the restraint by central differences over the 12 coordinates involved
        h = 1e-5
        for i in (a, b, c, d):
            for j in range(3):
                p = pos.copy()
                p[i, j] += h
                up = _dihedral_deg(p, a, b, c, d)
                p[i, j] -= 2 * h
                dn = _dihedral_deg(p, a, b, c, d)
                dphi = np.radians((up - dn + 180.0) % 360.0 - 180.0) / (2 * h)
                g[i, j] += k_eh * dev * dphi
        return e, g.ravel()


def _check_electrons(mol, numbers, charge, unpaired):
    """Refuse a charge and a number of unpaired electrons that the molecule's electrons cannot have
    (the electrons left after the unpaired ones must pair up: their count must be even)."""
    electrons = int(numbers.sum()) - int(charge)
    if electrons < 0 or not 0 <= int(unpaired) <= electrons or (electrons - int(unpaired)) % 2:
        formal = sum(atom.GetFormalCharge() for atom in mol.GetAtoms())
        hint = f" (the topology's formal charges sum to {formal:+d})" if formal else ""
        raise DihedraError(f"this molecule has {electrons} electrons at charge {int(charge):+d}, which cannot leave "
                           f"{int(unpaired)} unpaired{hint}; give its charge (--charge, charge=) and unpaired "
                           "electrons (--unpaired, unpaired=).")


def is_own_mirror_image(mol):
    """Whether a molecule (stereo taken from its 3-D coordinates) is the same molecule as its mirror
    image, so that its relaxed torsion energy obeys E(phi) = E(-phi)."""
    from rdkit import Chem
    from rdkit.Geometry import Point3D

    if mol.GetNumConformers() == 0:
        return False
    both = []
    for sign in (1.0, -1.0):
        work = Chem.Mol(mol)
        conf = work.GetConformer()
        for j, (x, y, z) in enumerate(conf.GetPositions()):
            conf.SetAtomPosition(j, Point3D(float(x), float(y), sign * float(z)))
        Chem.AssignStereochemistryFrom3D(work)
        both.append(Chem.MolToSmiles(work))
    return both[0] == both[1]


def mirror_asymmetry(angles_deg, energies_kj_mol):
    """Largest |E(phi) - E(-phi)| over the angles scanned at both signs, and the angle where it is."""
    energy = dict(zip(np.round(np.asarray(angles_deg, dtype=float), 6), np.asarray(energies_kj_mol, dtype=float)))
    pairs = [(abs(energy[a] - energy[-a]), float(a)) for a in energy if a > 0 and a < 180 and -a in energy]
    return max(pairs) if pairs else (float("nan"), float("nan"))


def xtb_scan(mol, torsion, step_deg=30.0, charge=0, unpaired=0, restraint_kj_mol_rad2=XTB_RESTRAINT_KJ_MOL_RAD2,
             gradient_tolerance=XTB_GRADIENT_TOLERANCE, max_iterations=500, progress=None):
    """Relaxed GFN2-xTB scan with tblite: restraint on the torsion plus L-BFGS-B.

    Parameters
    ----------
    mol : rdkit.Chem.Mol
        With explicit hydrogens and one conformer (e.g. from :func:`molecule_from_topology`).
    torsion : sequence of 4 int
    step_deg : float
        Spacing of the scan (must divide 360).
    charge, unpaired : int
        Total charge and number of unpaired electrons.
    restraint_kj_mol_rad2 : float
        Force constant k of the restraint k/2 (phi - phi0)^2.
    gradient_tolerance : float
        L-BFGS-B ``gtol``: the largest gradient component (hartree/bohr) at which a point counts as
        relaxed.
    progress : callable, optional
        ``progress(done, total, angle_deg, energy_kj_mol)``.

    Returns
    -------
    TorsionScan (kind ``relaxed``)
        Its metadata hold the tolerance, per point the largest remaining gradient component
        (``largest_gradient_hartree_bohr``) and the energy change of the last step
        (``last_step_energy_change_kj_mol``), the largest of each over the scan, the points left
        with a gradient above the tolerance (``above_tolerance_angles_deg``), and for a molecule
        that is its own mirror image the largest ``|E(phi) - E(-phi)|``
        (``mirror_asymmetry_kj_mol``, zero for an exact relaxed scan).
    """
    _require("tblite.interface", "a GFN2-xTB scan")
    _require("rdkit", "a GFN2-xTB scan")
    from rdkit.Chem import rdMolTransforms
    from scipy.optimize import minimize
    from tblite.interface import Calculator

    a, b, c, d = (int(i) for i in torsion)
    _check_rotatable(mol, (a, b, c, d))
    numbers = np.array([atom.GetAtomicNum() for atom in mol.GetAtoms()])
    _check_electrons(mol, numbers, charge, unpaired)
    conf = mol.GetConformer()
    x0 = np.array(conf.GetPositions(), dtype=float) / BOHR_ANGSTROM
    k_eh = restraint_kj_mol_rad2 / HARTREE_KJ_PER_MOL
    calc = Calculator("GFN2-xTB", numbers, x0, charge=float(charge), uhf=int(unpaired))
    calc.set("verbosity", 0)
    energy_gradient = _RestrainedEnergy(calc, (a, b, c, d), k_eh)

    targets = scan_angles(step_deg)
    up, _ = _sweep_order(targets, _dihedral_deg(x0, a, b, c, d))
    x = x0.copy()
    rows = {}
    for n_done, target in enumerate(up, start=1):
        conf_pos = x * BOHR_ANGSTROM
        for j in range(len(conf_pos)):
            conf.SetAtomPosition(j, conf_pos[j].tolist())
        rdMolTransforms.SetDihedralDeg(conf, a, b, c, d, float(target))
        x = np.array(conf.GetPositions(), dtype=float) / BOHR_ANGSTROM
        steps = []   # the objective after every iteration: the last difference is the last step's change
        out = minimize(energy_gradient, x.ravel(), args=(float(target),), jac=True, method="L-BFGS-B",
                       callback=lambda intermediate_result: steps.append(float(intermediate_result.fun)),
                       options={"gtol": gradient_tolerance, "ftol": _XTB_NO_ENERGY_STOP, "maxiter": max_iterations})
        x = out.x.reshape(-1, 3)
        calc.update(x)
        e_plain = float(calc.singlepoint().get("energy")) * HARTREE_KJ_PER_MOL
        last = abs(steps[-1] - steps[-2]) * HARTREE_KJ_PER_MOL if len(steps) > 1 else 0.0
        rows[float(target)] = (e_plain, _dihedral_deg(x, a, b, c, d), float(np.max(np.abs(out.jac))), last,
                               bool(out.success))
        if progress is not None:
            progress(n_done, len(up), float(target), e_plain)
    angles = np.array(sorted(rows))
    energy = np.array([rows[t][0] for t in angles])
    meta = {"method": f"GFN2-xTB relaxed scan (tblite {_version('tblite')}), harmonic torsion restraint "
                      f"{restraint_kj_mol_rad2:g} kJ/(mol rad^2), scipy L-BFGS-B to a largest gradient component "
                      f"of {gradient_tolerance:g} hartree/bohr",
            "kind": "relaxed", "step_deg": float(step_deg), "charge": int(charge), "unpaired_electrons": int(unpaired),
            "gradient_tolerance_hartree_bohr": float(gradient_tolerance),
            "lowest_energy_hartree": float(energy.min() / HARTREE_KJ_PER_MOL),
            "reached_angle_deg": {f"{t:g}": round(float(rows[t][1]), 3) for t in angles}}
    meta.update(_convergence(angles, energy, rows, mol, gradient_tolerance))
    return scan_from_points(angles, energy, kind="relaxed", source="GFN2-xTB", metadata=meta)


def _convergence(angles, energy, rows, mol, tolerance):
    """What the relaxation left undone, for the scan's metadata (see :func:`xtb_scan`)."""
    out = {"largest_gradient_hartree_bohr": {f"{t:g}": float(f"{rows[t][2]:.3g}") for t in angles},
           "last_step_energy_change_kj_mol": {f"{t:g}": float(f"{rows[t][3]:.3g}") for t in angles},
           "largest_remaining_gradient_hartree_bohr": float(max(rows[t][2] for t in angles)),
           "largest_last_step_energy_change_kj_mol": float(max(rows[t][3] for t in angles)),
           # points where the optimiser stopped first on its iteration limit or a failed line search
           "above_tolerance_angles_deg": [float(t) for t in angles if not rows[t][4] or rows[t][2] > tolerance]}
    if is_own_mirror_image(mol):
        worst, where = mirror_asymmetry(angles, energy)
        if worst == worst:
            out["mirror_asymmetry_kj_mol"] = round(float(worst), 4)
            out["mirror_asymmetry_angle_deg"] = where
    return out


def _version(name):
    import importlib.metadata as md
    try:
        return md.version(name)
    except md.PackageNotFoundError:
        return "?"
