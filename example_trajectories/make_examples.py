"""Make the bundled example trajectories with OpenMM and check them.

Two united-atom systems (all sites are CHx groups, no hydrogens):

* ``hexane``: liquid n-hexane, TraPPE-UA, NPT at 298.15 K and 1 bar (the demo system).
  Files ``hexane.pdb`` (whole molecules, CONECT bonds, CRYST1) and ``hexane.xtc``
  (wrapped as OpenMM writes them: each molecule is kept whole and its centre put in the box).
* ``butane_rb``: non-interacting n-butane molecules with the Ryckaert-Bellemans torsion
  (validation data: the torsion distribution of each molecule is exactly the Boltzmann
  distribution of the torsion potential). Files ``butane_rb.pdb`` and ``butane_rb.xtc``;
  in the XTC every site is put in the box on its own, so some molecules are split across
  the periodic boundary.

Use as a script (``python make_examples.py --help``) or import the functions:
``simulate_hexane``, ``simulate_butane_rb``, ``validate_hexane``, ``validate_butane_rb``.
OpenMM is imported only inside the functions that simulate; the checks need only numpy,
scipy and MDAnalysis (to read the files). The script does not use dihedra itself, so that
the data can check dihedra independently.

Parameter sources (see README.md in this folder): TraPPE-UA, Martin & Siepmann,
J. Phys. Chem. B 102 (1998) 2569 (values from memory); Ryckaert & Bellemans,
Faraday Discuss. Chem. Soc. 66 (1978) 95 (torsion coefficients as commonly quoted, from
memory; not re-checked against the paper).
"""

import argparse
import json
import os
import sys
import time

import numpy as np

# --------------------------------------------------------------------------------------------
# Constants and parameters
# --------------------------------------------------------------------------------------------

#: Molar gas constant in kJ/(mol K), CODATA 2018 (k_B * N_A, both exact).
R_KJ_PER_MOL_K = 1.380649e-23 * 6.02214076e23 / 1000.0
#: Avogadro constant in 1/mol, CODATA 2018 (exact).
N_A_PER_MOL = 6.02214076e23

#: United-atom masses in g/mol (TraPPE-UA, from memory).
MASS_CH3 = 15.035
MASS_CH2 = 14.027

#: TraPPE-UA (Martin & Siepmann 1998, from memory). Energies given as epsilon/k_B in K.
TRAPPE = {
    "CH3": {"epsilon_k": 98.0, "sigma_nm": 0.375, "mass": MASS_CH3},
    "CH2": {"epsilon_k": 46.0, "sigma_nm": 0.395, "mass": MASS_CH2},
    "bond_nm": 0.154,                 # constrained
    "angle_deg": 114.0,               # harmonic bend, E = k/2 (theta - theta0)^2
    "angle_k_k_per_rad2": 62500.0,    # k_theta / k_B in K/rad^2
    # V(phi) = c1 (1 + cos phi) + c2 (1 - cos 2phi) + c3 (1 + cos 3phi), phi IUPAC (trans = 180)
    "torsion_c_k": (355.03, -68.19, 791.32),
}

#: Ryckaert-Bellemans butane torsion, C0..C5 in kJ/mol (Ryckaert & Bellemans 1978),
#: V = sum_n C_n cos^n(psi), psi = phi - 180 deg.
RB_BUTANE_KJ_MOL = (9.28, 12.16, -13.12, -3.06, 26.24, -31.5)

#: Torsion states used by the checks (degrees, IUPAC convention).
ANTI_MIN_ABS_DEG = 120.0          # anti: |phi| >= 120 (the trans-gauche barriers of both models)
CORE_ANTI_MIN_ABS_DEG = 150.0     # core of the anti state for transition counting
CORE_GAUCHE_DEG = (30.0, 90.0)    # core of gauche+ (and mirrored gauche-)

DEFAULT_SEED = 20240601
HERE = os.path.dirname(os.path.abspath(__file__))


def trappe_torsion_kj_mol(phi_deg):
    """TraPPE-UA CHx-CH2-CH2-CHx torsion energy (kJ/mol) at IUPAC angle(s) ``phi_deg``."""
    c1, c2, c3 = (c * R_KJ_PER_MOL_K for c in TRAPPE["torsion_c_k"])
    phi = np.radians(phi_deg)
    return c1 * (1 + np.cos(phi)) + c2 * (1 - np.cos(2 * phi)) + c3 * (1 + np.cos(3 * phi))


def rb_torsion_kj_mol(phi_deg, coefficients=RB_BUTANE_KJ_MOL):
    """Ryckaert-Bellemans torsion energy (kJ/mol), psi = phi - 180 deg (phi IUPAC)."""
    cos_psi = np.cos(np.radians(np.asarray(phi_deg, dtype=float) - 180.0))
    return sum(c * cos_psi ** n for n, c in enumerate(coefficients))


# --------------------------------------------------------------------------------------------
# Geometry
# --------------------------------------------------------------------------------------------

def chain_coordinates(n_sites, bond_nm, angle_deg, torsions_deg):
    """Cartesian coordinates (nm) of a linear chain from its internal coordinates.

    ``torsions_deg`` has ``n_sites - 3`` IUPAC torsion angles; the chain is centred on 0.
    """
    theta = np.radians(angle_deg)
    xyz = np.zeros((n_sites, 3))
    xyz[1] = [bond_nm, 0.0, 0.0]
    xyz[2] = xyz[1] + bond_nm * np.array([-np.cos(theta), np.sin(theta), 0.0])
    for i in range(3, n_sites):
        a, b, c = xyz[i - 3], xyz[i - 2], xyz[i - 1]
        bc = (c - b) / np.linalg.norm(c - b)
        n = np.cross(b - a, bc)
        n /= np.linalg.norm(n)
        m = np.cross(n, bc)
        phi = np.radians(torsions_deg[i - 3])
        local = bond_nm * np.array([-np.cos(theta), np.sin(theta) * np.cos(phi),
                                    np.sin(theta) * np.sin(phi)])
        xyz[i] = c + local[0] * bc + local[1] * m + local[2] * n
    return xyz - xyz.mean(axis=0)


def random_rotation(rng):
    """A uniformly distributed random rotation matrix."""
    q = rng.normal(size=4)
    q /= np.linalg.norm(q)
    w, x, y, z = q
    return np.array([
        [1 - 2 * (y * y + z * z), 2 * (x * y - z * w), 2 * (x * z + y * w)],
        [2 * (x * y + z * w), 1 - 2 * (x * x + z * z), 2 * (y * z - x * w)],
        [2 * (x * z - y * w), 2 * (y * z + x * w), 1 - 2 * (x * x + y * y)],
    ])


def torsion_angles_deg(positions, quads, box_lengths=None):
    """IUPAC torsion angles (degrees on (-180, 180]) of ``quads`` (n, 4) index rows.

    ``positions`` is (n_frames, n_atoms, 3) or (n_atoms, 3). Bond vectors take the
    minimum image in an orthorhombic box ``box_lengths`` (same length unit), per frame
    if it is (n_frames, 3).
    """
    pos = np.asarray(positions, dtype=float)
    single = pos.ndim == 2
    if single:
        pos = pos[None]
    quads = np.asarray(quads)
    b = [pos[:, quads[:, k + 1]] - pos[:, quads[:, k]] for k in range(3)]
    if box_lengths is not None:
        box = np.asarray(box_lengths, dtype=float).reshape(-1, 1, 3)
        b = [v - box * np.round(v / box) for v in b]
    b1, b2, b3 = b
    n1 = np.cross(b1, b2)
    n2 = np.cross(b2, b3)
    x = np.einsum("...i,...i", n1, n2)
    y = np.einsum("...i,...i", np.cross(n1, n2), b2) / np.linalg.norm(b2, axis=-1)
    phi = np.degrees(np.arctan2(y, x))
    phi = np.where(phi <= -180.0, 180.0, phi)
    return phi[0] if single else phi


def _chain_quads(n_molecules, n_sites):
    """Index rows (i, j, k, l) of every backbone torsion of identical linear chains."""
    per = [(s, s + 1, s + 2, s + 3) for s in range(n_sites - 3)]
    return np.array([[m * n_sites + i for i in q] for m in range(n_molecules) for q in per])


def _chain_bonds(n_molecules, n_sites):
    return [(m * n_sites + s, m * n_sites + s + 1)
            for m in range(n_molecules) for s in range(n_sites - 1)]


def _chain_angles(n_molecules, n_sites):
    return [(m * n_sites + s, m * n_sites + s + 1, m * n_sites + s + 2)
            for m in range(n_molecules) for s in range(n_sites - 2)]


# --------------------------------------------------------------------------------------------
# OpenMM systems
# --------------------------------------------------------------------------------------------

def _site_kinds(n_sites):
    return ["CH3"] + ["CH2"] * (n_sites - 2) + ["CH3"]


def build_topology(n_molecules, n_sites, residue_name, box_nm):
    """OpenMM Topology: one residue per molecule, atoms C1..Cn (element C), bonds, box."""
    from openmm import Vec3, unit
    from openmm.app import Topology, element

    top = Topology()
    chain = top.addChain("A")
    for _ in range(n_molecules):
        res = top.addResidue(residue_name, chain)
        atoms = [top.addAtom(f"C{s + 1}", element.carbon, res) for s in range(n_sites)]
        for s in range(n_sites - 1):
            top.addBond(atoms[s], atoms[s + 1])
    top.setPeriodicBoxVectors((Vec3(box_nm, 0, 0), Vec3(0, box_nm, 0),
                               Vec3(0, 0, box_nm)) * unit.nanometer)
    return top


def _base_system(n_molecules, n_sites, box_nm, bond_nm, angle_deg, angle_k_kj_mol_rad2):
    """System with united-atom masses, constrained bonds and harmonic bends."""
    import openmm as mm

    system = mm.System()
    kinds = _site_kinds(n_sites)
    for _ in range(n_molecules):
        for kind in kinds:
            system.addParticle(TRAPPE[kind]["mass"])
    for i, j in _chain_bonds(n_molecules, n_sites):
        system.addConstraint(i, j, bond_nm)
    bends = mm.HarmonicAngleForce()
    for i, j, k in _chain_angles(n_molecules, n_sites):
        bends.addAngle(i, j, k, np.radians(angle_deg), angle_k_kj_mol_rad2)
    system.addForce(bends)
    system.setDefaultPeriodicBoxVectors(mm.Vec3(box_nm, 0, 0), mm.Vec3(0, box_nm, 0),
                                        mm.Vec3(0, 0, box_nm))
    return system


def trappe_torsion_force(quads):
    """OpenMM CustomTorsionForce with the TraPPE-UA alkane torsion on each (i, j, k, l)."""
    import openmm as mm

    torsion = mm.CustomTorsionForce(
        "c1*(1+cos(theta)) + c2*(1-cos(2*theta)) + c3*(1+cos(3*theta))")
    for name in ("c1", "c2", "c3"):
        torsion.addPerTorsionParameter(name)
    c_kj = [c * R_KJ_PER_MOL_K for c in TRAPPE["torsion_c_k"]]
    for quad in quads:
        torsion.addTorsion(*[int(i) for i in quad], c_kj)
    return torsion


def rb_torsion_force(quads, coefficients=RB_BUTANE_KJ_MOL):
    """OpenMM RBTorsionForce (its psi = phi - 180 deg convention) on each (i, j, k, l)."""
    import openmm as mm

    rb = mm.RBTorsionForce()
    for quad in quads:
        rb.addTorsion(*[int(i) for i in quad], *coefficients)
    return rb


def build_hexane_system(n_molecules, box_nm, cutoff_nm):
    """TraPPE-UA n-hexane: LJ (Lorentz-Berthelot, cutoff, tail correction), bends, torsions."""
    import openmm as mm

    n_sites = 6
    system = _base_system(n_molecules, n_sites, box_nm, TRAPPE["bond_nm"], TRAPPE["angle_deg"],
                          TRAPPE["angle_k_k_per_rad2"] * R_KJ_PER_MOL_K)
    system.addForce(trappe_torsion_force(_chain_quads(n_molecules, n_sites)))

    lj = mm.NonbondedForce()  # default combining rule is Lorentz-Berthelot
    lj.setNonbondedMethod(mm.NonbondedForce.CutoffPeriodic)
    lj.setCutoffDistance(cutoff_nm)
    lj.setUseSwitchingFunction(False)
    lj.setUseDispersionCorrection(True)
    for _ in range(n_molecules):
        for kind in _site_kinds(n_sites):
            p = TRAPPE[kind]
            lj.addParticle(0.0, p["sigma_nm"], p["epsilon_k"] * R_KJ_PER_MOL_K)
    # exclude 1-2, 1-3 and 1-4 pairs (scale factors 0): only sites > 3 bonds apart interact
    lj.createExceptionsFromBonds(_chain_bonds(n_molecules, n_sites), 0.0, 0.0)
    system.addForce(lj)
    return system


def build_butane_rb_system(n_molecules, box_nm):
    """Non-interacting UA n-butane: constrained bonds, harmonic bends, RB torsion, nothing else."""
    n_sites = 4
    system = _base_system(n_molecules, n_sites, box_nm, TRAPPE["bond_nm"], TRAPPE["angle_deg"],
                          TRAPPE["angle_k_k_per_rad2"] * R_KJ_PER_MOL_K)
    system.addForce(rb_torsion_force(_chain_quads(n_molecules, n_sites)))
    return system


def make_context(system, integrator, platform="CPU", threads=1):
    """Context on ``platform`` ("CPU" with ``threads`` threads, or "Reference").

    One CPU thread (the default) gives bitwise-repeatable runs on the same machine; two
    threads do not (the order of force sums varies). Falls back to the Reference platform
    when the CPU platform cannot be had.
    """
    import openmm as mm

    if platform == "CPU":
        try:
            props = {"Threads": str(threads or 1)}
            return mm.Context(system, integrator, mm.Platform.getPlatformByName("CPU"), props)
        except Exception:  # CPU platform missing: use the slow, always-present one
            pass
    return mm.Context(system, integrator, mm.Platform.getPlatformByName("Reference"))


def start_langevin(system, xyz_nm, temperature_k, friction_per_ps, timestep_fs, seed,
                   platform="CPU", threads=1, minimise=False):
    """LangevinMiddleIntegrator and Context with positions set, constraints applied,
    optionally energy-minimised, and seeded Maxwell-Boltzmann velocities.

    Seeds: integrator ``seed % 2**31 + 2``, velocities ``seed % 2**31 + 3``.
    """
    import openmm as mm
    from openmm import unit

    integrator = mm.LangevinMiddleIntegrator(temperature_k * unit.kelvin,
                                             friction_per_ps / unit.picosecond,
                                             timestep_fs * unit.femtosecond)
    integrator.setRandomNumberSeed(int(seed % 2**31) + 2)
    context = make_context(system, integrator, platform, threads)
    context.setPositions(np.asarray(xyz_nm) * unit.nanometer)
    context.applyConstraints(1e-8)
    if minimise:
        mm.LocalEnergyMinimizer.minimize(context, 10.0, 2000)
    context.setVelocitiesToTemperature(temperature_k * unit.kelvin, int(seed % 2**31) + 3)
    return context, integrator


def check_torsion_forms():
    """Compare OpenMM's torsion energies with the formulas here on one 4-site molecule.

    Returns {label_angle: (openmm_kj_mol, formula_kj_mol)} for the RB butane and the TraPPE
    torsions; raises AssertionError when they differ by more than 1e-6 kJ/mol (this catches
    a wrong phase convention, e.g. RB with psi = phi instead of phi - 180 deg).
    """
    import openmm as mm

    out = {}
    for label, force, formula in (("rb_butane", rb_torsion_force, rb_torsion_kj_mol),
                                  ("trappe", trappe_torsion_force, trappe_torsion_kj_mol)):
        for phi in (180.0, 0.0, 60.0, -60.0, 120.0):
            system = mm.System()
            for _ in range(4):
                system.addParticle(MASS_CH2)
            system.addForce(force([(0, 1, 2, 3)]))
            xyz = chain_coordinates(4, TRAPPE["bond_nm"], TRAPPE["angle_deg"], [phi])
            measured = float(torsion_angles_deg(xyz, [[0, 1, 2, 3]])[0])
            assert abs((measured - phi + 180.0) % 360.0 - 180.0) < 1e-6, (phi, measured)
            ctx = mm.Context(system, mm.VerletIntegrator(0.001),
                             mm.Platform.getPlatformByName("Reference"))
            ctx.setPositions(xyz)
            energy = ctx.getState(getEnergy=True).getPotentialEnergy()._value
            expected = float(formula(phi))
            assert abs(energy - expected) < 1e-6, (label, phi, energy, expected)
            out[f"{label}_{phi:g}_deg"] = (energy, expected)
            del ctx
    return out


# --------------------------------------------------------------------------------------------
# Files
# --------------------------------------------------------------------------------------------

def write_pdb(path, topology, positions_nm, box_nm):
    """PDB with CRYST1, element C and CONECT for every bond (OpenMM's writer)."""
    from openmm import Vec3, unit
    from openmm.app import PDBFile

    topology.setPeriodicBoxVectors((Vec3(box_nm[0], 0, 0), Vec3(0, box_nm[1], 0),
                                    Vec3(0, 0, box_nm[2])) * unit.nanometer)
    with open(path, "w") as fh:
        PDBFile.writeFile(topology, np.asarray(positions_nm) * unit.nanometer, fh)


def _remove(paths):
    for p in paths:
        if os.path.exists(p):
            os.remove(p)


def _state_arrays(context, wrap_molecules):
    from openmm import unit
    state = context.getState(getPositions=True, getEnergy=True,
                             enforcePeriodicBox=wrap_molecules)
    pos = state.getPositions(asNumpy=True).value_in_unit(unit.nanometer)
    box = np.diag(state.getPeriodicBoxVectors(asNumpy=True).value_in_unit(unit.nanometer))
    return np.asarray(pos), np.asarray(box), state


def run_production(context, integrator, xtc_path, topology, n_frames, steps_per_frame,
                   wrap="molecules", log_every=None):
    """Run ``n_frames`` x ``steps_per_frame`` steps and write a frame after each block.

    ``wrap="molecules"``: positions as OpenMM's reporters write them (whole molecules,
    centres in the box); ``wrap="atoms"``: every site put in the box on its own.
    Returns the per-frame box lengths (nm) and potential energies (kJ/mol).
    """
    from openmm.app.xtcfile import XTCFile

    dt_ps = integrator.getStepSize()._value
    xtc = XTCFile(xtc_path, topology, dt_ps, firstStep=steps_per_frame,
                  interval=steps_per_frame)
    boxes, energies = [], []
    t0 = time.time()
    for frame in range(n_frames):
        integrator.step(steps_per_frame)
        pos, box, state = _state_arrays(context, wrap == "molecules")
        if wrap == "atoms":
            pos = pos - box * np.floor(pos / box)
        xtc.writeModel(pos, unitCellDimensions=tuple(box))
        boxes.append(box)
        energies.append(state.getPotentialEnergy()._value)
        if log_every and (frame + 1) % log_every == 0:
            print(f"  frame {frame + 1}/{n_frames}  box {box[0]:.4f} nm  "
                  f"{time.time() - t0:.0f} s", flush=True)
    return np.array(boxes), np.array(energies)


# --------------------------------------------------------------------------------------------
# Simulations
# --------------------------------------------------------------------------------------------

def hexane_density_g_cm3(n_molecules, box_lengths_nm):
    """Mass density (g/cm^3) of ``n_molecules`` UA n-hexanes in orthorhombic box(es)."""
    mass_g = n_molecules * (2 * MASS_CH3 + 4 * MASS_CH2) / N_A_PER_MOL
    volume_cm3 = np.prod(np.atleast_2d(box_lengths_nm), axis=1) * 1e-21
    return mass_g / volume_cm3


def simulate_hexane(out_prefix, n_molecules=100, n_frames=1000, frame_interval_ps=1.0,
                    temperature_k=298.15, pressure_bar=1.0, seed=DEFAULT_SEED,
                    equilibration_ps=300.0, compression_ps=60.0, compression_bar=500.0,
                    target_density_g_cm3=0.655, cutoff_nm=1.2, timestep_fs=2.0,
                    friction_per_ps=1.0, platform="CPU", threads=1, verbose=True):
    """Liquid UA n-hexane (TraPPE-UA) at ``temperature_k`` and ``pressure_bar`` (NPT).

    Start: molecules all-trans with random orientations on a loose cubic lattice; energy
    minimisation; NPT at ``compression_bar`` for ``compression_ps`` (fast compression);
    NPT at ``pressure_bar`` for ``equilibration_ps``; then NPT production of ``n_frames``
    frames every ``frame_interval_ps``. The cutoff is reduced to 0.45 x the box length
    expected at ``target_density_g_cm3`` if that is smaller than ``cutoff_nm`` (small test
    systems). Writes ``out_prefix + ".pdb"`` (last equilibration frame, whole molecules)
    and ``out_prefix + ".xtc"``; returns a dict with run information.
    """
    import openmm as mm
    from openmm import unit

    t_start = time.time()
    n_sites = 6
    rng = np.random.default_rng(seed)
    target_box = (hexane_density_g_cm3(n_molecules, [1.0, 1.0, 1.0])[0]
                  / target_density_g_cm3) ** (1.0 / 3.0)
    cutoff = min(cutoff_nm, 0.45 * target_box)

    per_side = int(np.ceil(n_molecules ** (1.0 / 3.0)))
    spacing = 0.95  # nm, more than an all-trans hexane (about 0.64 nm end to end)
    box0 = per_side * spacing
    template = chain_coordinates(n_sites, TRAPPE["bond_nm"], TRAPPE["angle_deg"], [180.0] * 3)
    cells = [(i, j, k) for i in range(per_side) for j in range(per_side) for k in range(per_side)]
    chosen = rng.permutation(len(cells))[:n_molecules]
    xyz = np.concatenate([
        (np.array(cells[c]) + 0.5) * spacing + template @ random_rotation(rng).T
        for c in chosen])

    system = build_hexane_system(n_molecules, box0, cutoff)
    barostat = mm.MonteCarloBarostat(compression_bar * unit.bar, temperature_k * unit.kelvin, 10)
    barostat.setRandomNumberSeed(int(seed % 2**31) + 1)
    system.addForce(barostat)
    context, integrator = start_langevin(system, xyz, temperature_k, friction_per_ps,
                                         timestep_fs, seed, platform, threads, minimise=True)

    steps_per_ps = int(round(1000.0 / timestep_fs))
    log = []
    integrator.step(int(compression_ps * steps_per_ps))
    _, box, _ = _state_arrays(context, True)
    log.append(("compressed", float(hexane_density_g_cm3(n_molecules, box)[0])))
    barostat.setDefaultPressure(pressure_bar * unit.bar)
    barostat.setFrequency(25)
    context.reinitialize(preserveState=True)
    context.setParameter(mm.MonteCarloBarostat.Pressure(), pressure_bar)
    eq_boxes = []
    n_chunks = max(1, int(equilibration_ps))
    for _ in range(n_chunks):
        integrator.step(int(equilibration_ps / n_chunks * steps_per_ps))
        eq_boxes.append(_state_arrays(context, True)[1])
    eq_density = hexane_density_g_cm3(n_molecules, np.array(eq_boxes[len(eq_boxes) // 2:]))
    log.append(("equilibrated (second half)", float(eq_density.mean())))
    if verbose:
        for name, d in log:
            print(f"  hexane {name}: density {d:.4f} g/cm3", flush=True)

    pos, box, _ = _state_arrays(context, True)
    topology = build_topology(n_molecules, n_sites, "HEX", box[0])
    _remove([out_prefix + ".pdb", out_prefix + ".xtc"])
    write_pdb(out_prefix + ".pdb", topology, pos, box)
    t_prod = time.time()
    steps_per_frame = int(round(frame_interval_ps * steps_per_ps))
    boxes, energies = run_production(context, integrator, out_prefix + ".xtc", topology,
                                     n_frames, steps_per_frame, wrap="molecules",
                                     log_every=max(1, n_frames // 10) if verbose else None)
    density = hexane_density_g_cm3(n_molecules, boxes)
    return {
        "system": "hexane", "n_molecules": n_molecules, "n_frames": n_frames,
        "frame_interval_ps": frame_interval_ps, "temperature_k": temperature_k,
        "pressure_bar": pressure_bar, "seed": seed, "cutoff_nm": cutoff,
        "timestep_fs": timestep_fs, "friction_per_ps": friction_per_ps,
        "equilibration_ps": equilibration_ps, "compression_ps": compression_ps,
        "compression_bar": compression_bar,
        "platform": context.getPlatform().getName(), "openmm_version": mm.__version__,
        "density_compressed_g_cm3": log[0][1], "density_equilibration_g_cm3": log[1][1],
        "density_production_mean_g_cm3": float(density.mean()),
        "density_production_std_g_cm3": float(density.std()),
        "box_production_mean_nm": float(boxes[:, 0].mean()),
        "potential_energy_mean_kj_mol": float(energies.mean()),
        "wall_time_total_s": time.time() - t_start,
        "wall_time_production_s": time.time() - t_prod,
    }


def sample_rb_torsions_deg(n, temperature_k, rng, coefficients=RB_BUTANE_KJ_MOL):
    """Draw ``n`` torsion angles from p(phi) ~ exp(-V_RB(phi)/RT) (inverse CDF on a grid)."""
    grid = np.linspace(-180.0, 180.0, 36001)
    w = np.exp(-rb_torsion_kj_mol(grid, coefficients) / (R_KJ_PER_MOL_K * temperature_k))
    cdf = np.concatenate([[0.0], np.cumsum(0.5 * (w[1:] + w[:-1]))])
    return np.interp(rng.random(n) * cdf[-1], cdf, grid)


def simulate_butane_rb(out_prefix, n_molecules=100, n_frames=2000, frame_interval_ps=1.0,
                       temperature_k=298.15, seed=DEFAULT_SEED, box_nm=3.0,
                       equilibration_ps=100.0, timestep_fs=2.0, friction_per_ps=5.0,
                       platform="Reference", threads=1, verbose=True):
    """Non-interacting UA n-butanes with the Ryckaert-Bellemans torsion (Langevin, NVT).

    Each molecule starts with a torsion drawn from its Boltzmann distribution and a random
    position and orientation; after ``equilibration_ps`` the run writes ``n_frames`` frames
    every ``frame_interval_ps``. In the XTC every site is wrapped into the cubic box of side
    ``box_nm`` on its own (molecules may be split); the PDB has whole molecules.
    Writes ``out_prefix + ".pdb"`` and ``out_prefix + ".xtc"``; returns a dict of run info.
    """
    import openmm as mm

    t_start = time.time()
    n_sites = 4
    rng = np.random.default_rng(seed)
    phis = sample_rb_torsions_deg(n_molecules, temperature_k, rng)
    xyz = np.concatenate([
        rng.random(3) * box_nm
        + chain_coordinates(n_sites, TRAPPE["bond_nm"], TRAPPE["angle_deg"], [phi])
        @ random_rotation(rng).T
        for phi in phis])

    system = build_butane_rb_system(n_molecules, box_nm)
    context, integrator = start_langevin(system, xyz, temperature_k, friction_per_ps,
                                         timestep_fs, seed, platform, threads, minimise=False)
    steps_per_ps = int(round(1000.0 / timestep_fs))
    integrator.step(int(equilibration_ps * steps_per_ps))

    topology = build_topology(n_molecules, n_sites, "BUT", box_nm)
    pos, box, _ = _state_arrays(context, False)
    # whole molecules for the PDB: shift each molecule so that its first site is in the box
    first = pos[::n_sites]
    shift = np.repeat(box * np.floor(first / box), n_sites, axis=0)
    _remove([out_prefix + ".pdb", out_prefix + ".xtc"])
    write_pdb(out_prefix + ".pdb", topology, pos - shift, box)
    t_prod = time.time()
    steps_per_frame = int(round(frame_interval_ps * steps_per_ps))
    run_production(context, integrator, out_prefix + ".xtc", topology, n_frames,
                   steps_per_frame, wrap="atoms",
                   log_every=max(1, n_frames // 10) if verbose else None)
    return {
        "system": "butane_rb", "n_molecules": n_molecules, "n_frames": n_frames,
        "frame_interval_ps": frame_interval_ps, "temperature_k": temperature_k,
        "seed": seed, "box_nm": box_nm, "timestep_fs": timestep_fs,
        "friction_per_ps": friction_per_ps, "equilibration_ps": equilibration_ps,
        "platform": context.getPlatform().getName(), "openmm_version": mm.__version__,
        "wall_time_total_s": time.time() - t_start,
        "wall_time_production_s": time.time() - t_prod,
    }


# --------------------------------------------------------------------------------------------
# Checks (plain numpy on the written files)
# --------------------------------------------------------------------------------------------

def read_chain_torsions(pdb_path, xtc_path, n_sites):
    """Backbone torsions (deg, minimum image) of every frame: array (n_frames, n_torsions).

    Also returns the frame times (ps) and the number of bonds read from the PDB.
    """
    import MDAnalysis as mda

    u = mda.Universe(pdb_path, xtc_path)
    n_molecules = len(u.atoms) // n_sites
    quads = _chain_quads(n_molecules, n_sites)
    phis, times = [], []
    for ts in u.trajectory:
        phis.append(torsion_angles_deg(ts.positions, quads, ts.dimensions[:3]))
        times.append(ts.time)
    return np.array(phis), np.array(times), len(u.bonds)


def split_molecule_fraction(pdb_path, xtc_path, n_sites, max_bond_nm=0.2):
    """Fraction of (frame, molecule) pairs whose stored coordinates cross the box edge."""
    import MDAnalysis as mda

    u = mda.Universe(pdb_path, xtc_path)
    bonds = np.array(_chain_bonds(len(u.atoms) // n_sites, n_sites))
    split = []
    for ts in u.trajectory:
        d = np.linalg.norm(ts.positions[bonds[:, 1]] - ts.positions[bonds[:, 0]], axis=1)
        split.append((d.reshape(-1, n_sites - 1) > 10 * max_bond_nm).any(axis=1))
    return float(np.mean(split))


def rb_boltzmann_anti_fraction(temperature_k, coefficients=RB_BUTANE_KJ_MOL):
    """Fraction of p(phi) ~ exp(-V_RB/RT) with |phi| >= 120 deg (scipy quad, no Jacobian)."""
    from scipy.integrate import quad

    kt = R_KJ_PER_MOL_K * temperature_k

    def w(phi):
        return np.exp(-rb_torsion_kj_mol(phi, coefficients) / kt)

    total = sum(quad(w, a, b)[0] for a, b in ((-180, -120), (-120, 0), (0, 120), (120, 180)))
    anti = quad(w, ANTI_MIN_ABS_DEG, 180.0)[0] + quad(w, -180.0, -ANTI_MIN_ABS_DEG)[0]
    return anti / total


def core_state_series(phi_deg):
    """Transition-based (core-set) states along axis 0: 0 anti, 1 gauche+, 2 gauche-.

    A frame outside every core keeps the state of the last core it visited (-1 before any).
    """
    a = np.abs(phi_deg)
    raw = np.full(phi_deg.shape, -1, dtype=int)
    raw[a >= CORE_ANTI_MIN_ABS_DEG] = 0
    lo, hi = CORE_GAUCHE_DEG
    raw[(phi_deg > lo) & (phi_deg < hi)] = 1
    raw[(phi_deg < -lo) & (phi_deg > -hi)] = 2
    out = raw.copy()
    for t in range(1, out.shape[0]):
        keep = out[t] < 0
        out[t, keep] = out[t - 1, keep]
    return out


def count_transitions(states):
    """Number of state changes along axis 0 (ignoring the unassigned start)."""
    prev, cur = states[:-1], states[1:]
    return int(np.sum((prev >= 0) & (cur >= 0) & (prev != cur)))


def validate_butane_rb(prefix, temperature_k=298.15, bin_deg=5.0, v_max_kj_mol=15.0,
                       n_groups=10):
    """Compare the sampled torsions of ``prefix``.pdb/.xtc with the RB Boltzmann distribution.

    The anti fraction (|phi| >= 120) is compared with the Boltzmann integral; its standard
    error comes from the spread between molecules (independent by construction). The
    histogram free energy F = -RT ln p is compared, per bin, with the bin-averaged
    Boltzmann value -RT ln(mean over the bin of exp(-V/RT)), offset fitted over the bins
    where that reference is below ``v_max_kj_mol``; per-bin errors from ``n_groups``
    groups of molecules.
    """
    phi, times, n_bonds = read_chain_torsions(prefix + ".pdb", prefix + ".xtc", 4)
    n_frames, n_mol = phi.shape
    kt = R_KJ_PER_MOL_K * temperature_k
    anti = np.abs(phi) >= ANTI_MIN_ABS_DEG
    per_mol = anti.mean(axis=0)
    measured = float(per_mol.mean())
    se = float(per_mol.std(ddof=1) / np.sqrt(n_mol))
    expected = rb_boltzmann_anti_fraction(temperature_k)

    edges = np.arange(-180.0, 180.0 + bin_deg / 2, bin_deg)
    centres = 0.5 * (edges[1:] + edges[:-1])
    fine = np.linspace(-180, 180, 36001)
    wf = np.exp(-rb_torsion_kj_mol(fine) / kt)
    ref = np.array([-kt * np.log(wf[(fine >= a) & (fine <= b)].mean())
                    for a, b in zip(edges[:-1], edges[1:])])
    counts = np.histogram(phi.ravel(), edges)[0]
    groups = np.array_split(np.arange(n_mol), n_groups)
    group_f = []
    for g in groups:
        c = np.histogram(phi[:, g].ravel(), edges)[0].astype(float)
        with np.errstate(divide="ignore"):
            group_f.append(-kt * np.log(c / c.sum()))
    group_f = np.array(group_f)
    with np.errstate(divide="ignore"):
        f = -kt * np.log(counts / counts.sum())
    ok = (ref < v_max_kj_mol) & (counts > 0)
    offset = float(np.average(f[ok] - ref[ok], weights=counts[ok]))
    diff = f - offset - ref
    with np.errstate(invalid="ignore"):  # a bin empty in some group has no error estimate
        err = group_f[:, ok].std(axis=0, ddof=1) / np.sqrt(n_groups)
    err[~np.isfinite(err)] = np.nan
    states = core_state_series(phi)
    transitions = count_transitions(states)
    total_ps = (times[-1] - times[0]) if n_frames > 1 else 0.0
    return {
        "n_frames": int(n_frames), "n_molecules": int(n_mol), "n_bonds_in_pdb": int(n_bonds),
        "n_torsion_samples": int(phi.size),
        "frame_interval_ps": float(times[1] - times[0]) if n_frames > 1 else None,
        "temperature_k": temperature_k,
        "anti_fraction_measured": measured, "anti_fraction_standard_error": se,
        "anti_fraction_boltzmann": expected,
        "anti_fraction_z": (measured - expected) / se if se > 0 else None,
        "free_energy_bin_deg": bin_deg, "free_energy_bins_compared": int(ok.sum()),
        "free_energy_max_abs_diff_kj_mol": float(np.max(np.abs(diff[ok]))),
        "free_energy_rms_diff_kj_mol": float(np.sqrt(np.mean(diff[ok] ** 2))),
        "free_energy_max_abs_diff_over_error": float(np.nanmax(np.abs(diff[ok]) / err))
        if np.isfinite(err).any() else None,
        "free_energy_worst_bin_centre_deg": float(centres[ok][np.argmax(np.abs(diff[ok]))]),
        "min_count_in_compared_bins": int(counts[ok].min()),
        "core_transitions": transitions,
        "core_transitions_per_molecule_per_ns": transitions / n_mol / (total_ps / 1000.0)
        if total_ps > 0 else None,
        "split_molecule_fraction": split_molecule_fraction(prefix + ".pdb", prefix + ".xtc", 4),
    }


def validate_hexane(prefix):
    """Gauche fraction and transition counts of the C-C-C-C torsions of ``prefix``.pdb/.xtc."""
    phi, times, n_bonds = read_chain_torsions(prefix + ".pdb", prefix + ".xtc", 6)
    n_frames, n_tor = phi.shape
    gauche = np.abs(phi) < ANTI_MIN_ABS_DEG
    per_tor = gauche.mean(axis=0)
    # torsions of one molecule are correlated: errors from molecule means
    per_mol = per_tor.reshape(-1, 3).mean(axis=1)
    inner = per_tor.reshape(-1, 3)[:, 1]
    outer = per_tor.reshape(-1, 3)[:, [0, 2]].ravel()
    states = core_state_series(phi)
    transitions = count_transitions(states)
    crossings = int(np.sum(gauche[1:] != gauche[:-1]))
    total_ps = times[-1] - times[0] if n_frames > 1 else 0.0
    per_tor_trans = np.array([count_transitions(states[:, [k]]) for k in range(n_tor)])
    return {
        "n_frames": int(n_frames), "n_torsions": int(n_tor), "n_bonds_in_pdb": int(n_bonds),
        "frame_interval_ps": float(times[1] - times[0]) if n_frames > 1 else None,
        "gauche_fraction": float(gauche.mean()),
        "gauche_fraction_standard_error": float(per_mol.std(ddof=1) / np.sqrt(len(per_mol))),
        "gauche_fraction_inner_torsion": float(inner.mean()),
        "gauche_fraction_outer_torsions": float(outer.mean()),
        "core_transitions": transitions,
        "core_transitions_per_torsion_per_ns": transitions / n_tor / (total_ps / 1000.0)
        if total_ps > 0 else None,
        "torsions_without_transition": int(np.sum(per_tor_trans == 0)),
        "crossings_of_120_deg": crossings,
        "split_molecule_fraction": split_molecule_fraction(prefix + ".pdb", prefix + ".xtc", 6),
    }


# --------------------------------------------------------------------------------------------
# Command line
# --------------------------------------------------------------------------------------------

def main(argv=None):
    parser = argparse.ArgumentParser(
        description="Simulate the bundled example trajectories with OpenMM and check them.")
    parser.add_argument("--system", choices=["hexane", "butane_rb", "both"], default="both",
                        help="which example to make (default: both)")
    parser.add_argument("--out-dir", default=HERE, help="folder for the files (default: here)")
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED,
                        help="seed for the start structures, integrator, barostat, velocities")
    parser.add_argument("--temperature-k", type=float, default=298.15,
                        help="temperature in kelvin (default 298.15)")
    parser.add_argument("--threads", type=int, default=1,
                        help="CPU-platform threads for hexane (1 gives repeatable runs)")
    parser.add_argument("--hexane-molecules", type=int, default=100, help="default 100")
    parser.add_argument("--hexane-frames", type=int, default=1000, help="default 1000")
    parser.add_argument("--hexane-interval-ps", type=float, default=1.0,
                        help="time between frames (default 1 ps)")
    parser.add_argument("--hexane-equilibration-ps", type=float, default=300.0,
                        help="NPT at 1 bar before production (default 300 ps)")
    parser.add_argument("--butane-molecules", type=int, default=100, help="default 100")
    parser.add_argument("--butane-frames", type=int, default=2000, help="default 2000")
    parser.add_argument("--butane-interval-ps", type=float, default=1.0,
                        help="time between frames (default 1 ps)")
    parser.add_argument("--butane-box-nm", type=float, default=3.0,
                        help="side of the cubic box (default 3 nm)")
    parser.add_argument("--check-only", action="store_true",
                        help="do not simulate; only check the files already there")
    parser.add_argument("--summary-json", default=None,
                        help="also write the run information and check results to this file")
    args = parser.parse_args(argv)

    os.makedirs(args.out_dir, exist_ok=True)
    summary = {"torsion_forms": {k: list(v) for k, v in check_torsion_forms().items()}}
    print("OpenMM torsion energies match the formulas (RB: V(180)=0, V(0)=44.80 kJ/mol).")
    systems = ["hexane", "butane_rb"] if args.system == "both" else [args.system]
    for name in systems:
        prefix = os.path.join(args.out_dir, name)
        if not args.check_only:
            print(f"simulating {name} ...", flush=True)
            if name == "hexane":
                info = simulate_hexane(prefix, args.hexane_molecules, args.hexane_frames,
                                       args.hexane_interval_ps, args.temperature_k,
                                       seed=args.seed,
                                       equilibration_ps=args.hexane_equilibration_ps,
                                       threads=args.threads)
            else:
                info = simulate_butane_rb(prefix, args.butane_molecules, args.butane_frames,
                                          args.butane_interval_ps, args.temperature_k,
                                          seed=args.seed, box_nm=args.butane_box_nm,
                                          threads=args.threads)
            summary[name + "_run"] = info
        check = (validate_hexane(prefix) if name == "hexane"
                 else validate_butane_rb(prefix, args.temperature_k))
        check["files_bytes"] = {ext: os.path.getsize(prefix + ext) for ext in (".pdb", ".xtc")}
        summary[name + "_check"] = check
        print(json.dumps({k: v for k, v in summary.items() if k.startswith(name)}, indent=2),
              flush=True)
    if args.summary_json:
        with open(args.summary_json, "w") as fh:
            json.dump(summary, fh, indent=2)
    return 0


if __name__ == "__main__":
    sys.exit(main())
