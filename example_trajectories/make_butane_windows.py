"""Umbrella windows of Ryckaert-Bellemans butane with OpenMM (validation data for ``dihedra windows``).

Non-interacting united-atom n-butane molecules with the force field of ``make_examples.py``
(constrained bonds, harmonic bends, the Ryckaert-Bellemans torsion, nothing else) plus an umbrella
bias on every torsion,

    w(phi) = 0.5 k d^2,   d = minimum-image (phi - centre) in radians,

as an OpenMM ``CustomTorsionForce`` (OpenMM's theta has the IUPAC sign; checked below). All windows
run in one OpenMM system (each molecule carries the centre of its window as a per-torsion
parameter; the molecules do not interact, so this equals separate simulations) and every window is
written to its own XTC file, with one PDB topology and ``windows.csv`` for ``dihedra windows``.

Without the bias the syn barrier of the RB potential (V(0) = 44.8 kJ/mol, about 18 kT at 298 K) is
never crossed in a run of this length; the windows sample it. The torsion distribution of each
molecule is exactly exp(-(V_RB + w)/kT): bond constraints and bends do not couple to the torsion
in a 4-site chain.

Use: ``python make_butane_windows.py [--out-dir butane_windows]`` (about 5 minutes on one core).
The defaults (36 windows 10 degrees apart, k = 400 kJ/mol/rad^2, 50 molecules x 85 frames 2 ps
apart per window, 4250 torsion samples per window) made the bundled ``butane_windows/`` folder
(under 3 MB of XTC).
"""

import argparse
import json
import os
import sys
import time

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)
import make_examples as me  # noqa: E402  (force field and geometry of the example systems)

#: Window centres (degrees) and force constant (kJ/mol/rad^2): k exceeds the largest negative
#: curvature of V_RB (about 233 kJ/mol/rad^2 at the syn barrier), so every window is unimodal.
DEFAULT_CENTRES_DEG = tuple(float(c) for c in np.arange(-180.0, 180.0, 10.0))
DEFAULT_K = 400.0
DEFAULT_SEED = 20240611
BIAS_EXPRESSION = "0.5*k*min(dtheta, 2*pi-dtheta)^2; dtheta = abs(theta-theta0); pi = 3.141592653589793"


def umbrella_force(quads, centres_deg, k_kj_mol_rad2):
    """CustomTorsionForce: 0.5 k d^2 on each torsion (i, j, k, l) about its own centre."""
    import openmm as mm

    force = mm.CustomTorsionForce(BIAS_EXPRESSION)
    force.addGlobalParameter("k", float(k_kj_mol_rad2))
    force.addPerTorsionParameter("theta0")
    for quad, centre in zip(quads, centres_deg):
        force.addTorsion(*[int(i) for i in quad], [float(np.radians(centre))])
    return force


def check_bias_sign():
    """The bias energy at IUPAC +60 deg with centre +90 deg must be 0.5 k (30 deg)^2."""
    import openmm as mm

    system = mm.System()
    for _ in range(4):
        system.addParticle(14.0)
    system.addForce(umbrella_force([(0, 1, 2, 3)], [90.0], 100.0))
    xyz = me.chain_coordinates(4, me.TRAPPE["bond_nm"], me.TRAPPE["angle_deg"], [60.0])
    ctx = mm.Context(system, mm.VerletIntegrator(0.001), mm.Platform.getPlatformByName("Reference"))
    ctx.setPositions(xyz)
    energy = ctx.getState(getEnergy=True).getPotentialEnergy()._value
    expected = 0.5 * 100.0 * np.radians(30.0) ** 2
    assert abs(energy - expected) < 1e-6, (energy, expected)
    return energy


def simulate_windows(out_dir, centres_deg=DEFAULT_CENTRES_DEG, k_kj_mol_rad2=DEFAULT_K, n_molecules=50,
                     n_frames=85, frame_interval_ps=2.0, equilibration_ps=5.0, temperature_k=298.15,
                     timestep_fs=2.0, friction_per_ps=5.0, seed=DEFAULT_SEED, box_nm=4.0, verbose=True):
    """Simulate every window and write ``out_dir``/butane.pdb, wNN.xtc and windows.csv."""
    import warnings

    import MDAnalysis as mda
    import openmm as mm
    from openmm import unit

    t0 = time.time()
    check_bias_sign()
    os.makedirs(out_dir, exist_ok=True)
    n_win = len(centres_deg)
    n_total = n_win * n_molecules
    rng = np.random.default_rng(seed)
    centre_of = np.repeat(np.asarray(centres_deg, dtype=float), n_molecules)
    xyz = np.concatenate([
        rng.random(3) * box_nm
        + me.chain_coordinates(4, me.TRAPPE["bond_nm"], me.TRAPPE["angle_deg"], [c]) @ me.random_rotation(rng).T
        for c in centre_of])
    system = me.build_butane_rb_system(n_total, box_nm)
    system.addForce(umbrella_force(me._chain_quads(n_total, 4), centre_of, k_kj_mol_rad2))
    integrator = mm.LangevinMiddleIntegrator(temperature_k * unit.kelvin, friction_per_ps / unit.picosecond,
                                             timestep_fs * unit.femtosecond)
    integrator.setRandomNumberSeed(int(seed % 2**31) + 2)
    context = me.make_context(system, integrator, "Reference")
    context.setPositions(xyz * unit.nanometer)
    context.applyConstraints(1e-8)
    context.setVelocitiesToTemperature(temperature_k * unit.kelvin, int(seed % 2**31) + 3)
    steps_per_ps = int(round(1000.0 / timestep_fs))
    integrator.step(int(equilibration_ps * steps_per_ps))

    # topology of one window (n_molecules butanes), written once
    pdb = os.path.join(out_dir, "butane.pdb")
    pos = context.getState(getPositions=True).getPositions(asNumpy=True).value_in_unit(unit.nanometer)
    me.write_pdb(pdb, me.build_topology(n_molecules, 4, "BUT", box_nm), pos[: 4 * n_molecules],
                 np.array([box_nm] * 3))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        u = mda.Universe(pdb)
        writers = [mda.Writer(os.path.join(out_dir, f"w{w:02d}.xtc"), u.atoms.n_atoms, dt=frame_interval_ps)
                   for w in range(n_win)]
        steps = int(round(frame_interval_ps * steps_per_ps))
        try:
            for frame in range(n_frames):
                integrator.step(steps)
                pos = context.getState(getPositions=True).getPositions(asNumpy=True).value_in_unit(unit.nanometer)
                pos = pos.reshape(n_win, 4 * n_molecules, 3) * 10.0  # Angstrom, whole molecules
                for w, writer in enumerate(writers):
                    u.atoms.positions = pos[w]
                    u.dimensions = [box_nm * 10.0] * 3 + [90.0] * 3
                    writer.write(u.atoms)
                if verbose and (frame + 1) % max(1, n_frames // 10) == 0:
                    print(f"  frame {frame + 1}/{n_frames}  {time.time() - t0:.0f} s", flush=True)
        finally:
            for writer in writers:
                writer.close()
    with open(os.path.join(out_dir, "windows.csv"), "w") as fh:
        fh.write("trajectory,topology,torsions,centre_deg,k_kj_mol_rad2\n")
        for w, c in enumerate(centres_deg):
            fh.write(f"w{w:02d}.xtc,butane.pdb,rotatable,{c:g},{k_kj_mol_rad2:g}\n")
    info = {"system": "Ryckaert-Bellemans butane (united atom) in umbrella windows",
            "centres_deg": list(centres_deg), "k_kj_mol_rad2": k_kj_mol_rad2, "bias": BIAS_EXPRESSION,
            "n_molecules_per_window": n_molecules, "n_frames": n_frames, "frame_interval_ps": frame_interval_ps,
            "equilibration_ps": equilibration_ps, "temperature_k": temperature_k, "timestep_fs": timestep_fs,
            "friction_per_ps": friction_per_ps, "seed": seed, "box_nm": box_nm,
            "rb_coefficients_kj_mol": list(me.RB_BUTANE_KJ_MOL), "openmm_version": mm.__version__,
            "platform": context.getPlatform().getName(), "wall_time_s": round(time.time() - t0, 1)}
    with open(os.path.join(out_dir, "windows_run.json"), "w") as fh:
        json.dump(info, fh, indent=2)
    return info


def main(argv=None):
    parser = argparse.ArgumentParser(description="Umbrella windows of RB butane with OpenMM.")
    parser.add_argument("--out-dir", default=os.path.join(HERE, "butane_windows"))
    parser.add_argument("--molecules", type=int, default=50, help="molecules per window")
    parser.add_argument("--frames", type=int, default=85, help="frames per window")
    parser.add_argument("--interval-ps", type=float, default=2.0)
    parser.add_argument("--k", type=float, default=DEFAULT_K, help="force constant, kJ/mol/rad^2")
    parser.add_argument("--spacing-deg", type=float, default=10.0)
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED)
    args = parser.parse_args(argv)
    centres = tuple(float(c) for c in np.arange(-180.0, 180.0, args.spacing_deg))
    info = simulate_windows(args.out_dir, centres, args.k, args.molecules, args.frames, args.interval_ps,
                            seed=args.seed)
    print(json.dumps(info, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
