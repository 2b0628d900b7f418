"""United-atom butane gas with a known extra torsion term (OpenMM): test data for ``dihedra refit``.

Non-interacting united-atom n-butane molecules with the force field of ``make_examples.py``
(constrained bonds, harmonic bends, the Ryckaert-Bellemans torsion, nothing else; Ryckaert &
Bellemans, Faraday Discuss. Chem. Soc. 66 (1978) 95) plus one extra periodic term on every torsion,

    dV_true(phi) = k [1 + cos(n phi - delta)]      (OpenMM PeriodicTorsionForce, phi IUPAC),

and, optionally, further periodic terms (a fitted correction, to check that it moves the
populations the right way). The torsion distribution of each molecule is exactly
p(phi) ~ exp(-(V_RB + dV_true + ...)/kT) (the bond constraints and bends of a 4-site chain do not
couple to the torsion, and a torsion angle needs no Jacobian; see README.md here), so a fit of a
correction against the exact Boltzmann profile or populations of V_RB alone must give back
-dV_true up to a constant.

Each molecule starts with a torsion drawn from ``start_potential`` (by default the simulated one,
so the gas is at equilibrium from the first frame), a random position and orientation, and
Maxwell-Boltzmann velocities; Langevin dynamics (OpenMM's Reference platform: the fastest for a
system without nonbonded forces). Frames are written as XTC with whole molecules.

Use as a script (``python make_refit_butane.py --help``; a few seconds with the defaults) or
import :func:`simulate_butane_with_terms` (the tests do, into a temporary folder).
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

#: The default extra term: k = 2 kJ/mol, n = 1, delta = 0 deg (penalises gauche by 1.5 k).
DEFAULT_EXTRA = ((1, 2.0, 0.0),)
DEFAULT_SEED = 20240719


def periodic_energy_kj_mol(phi_deg, terms):
    """sum k [1 + cos(n phi - delta)] over ``terms`` of (n, k_kj_mol, delta_deg)."""
    phi = np.radians(np.asarray(phi_deg, dtype=float))
    out = np.zeros_like(phi)
    for n, k, delta in terms:
        out = out + k * (1.0 + np.cos(n * phi - np.radians(delta)))
    return out


def total_energy_kj_mol(phi_deg, terms=DEFAULT_EXTRA):
    """V_RB(phi) plus the periodic ``terms``."""
    return me.rb_torsion_kj_mol(phi_deg) + periodic_energy_kj_mol(phi_deg, terms)


def sample_torsions_deg(n, temperature_k, rng, energy):
    """Draw ``n`` angles from p(phi) ~ exp(-energy(phi)/RT) (inverse CDF on a 0.01-degree grid)."""
    grid = np.linspace(-180.0, 180.0, 36001)
    v = energy(grid)
    w = np.exp(-(v - v.min()) / (me.R_KJ_PER_MOL_K * temperature_k))
    cdf = np.concatenate([[0.0], np.cumsum(0.5 * (w[1:] + w[:-1]))])
    return np.interp(rng.random(n) * cdf[-1], cdf, grid)


def periodic_force(quads, terms):
    """OpenMM PeriodicTorsionForce with every (n, k_kj_mol, delta_deg) of ``terms`` on each quad."""
    import openmm as mm

    force = mm.PeriodicTorsionForce()
    for quad in quads:
        for n, k, delta in terms:
            force.addTorsion(*[int(i) for i in quad], int(n), float(np.radians(delta)), float(k))
    return force


def check_periodic_sign(terms=DEFAULT_EXTRA):
    """OpenMM's PeriodicTorsionForce energy at IUPAC +-60, 0, 120, 180 deg equals the formula."""
    import openmm as mm

    for phi in (60.0, -60.0, 0.0, 120.0, 180.0):
        system = mm.System()
        for _ in range(4):
            system.addParticle(me.MASS_CH2)
        system.addForce(periodic_force([(0, 1, 2, 3)], terms))
        xyz = me.chain_coordinates(4, me.TRAPPE["bond_nm"], me.TRAPPE["angle_deg"], [phi])
        ctx = mm.Context(system, mm.VerletIntegrator(0.001), mm.Platform.getPlatformByName("Reference"))
        ctx.setPositions(xyz)
        energy = ctx.getState(getEnergy=True).getPotentialEnergy()._value
        expected = float(periodic_energy_kj_mol(phi, terms))
        assert abs(energy - expected) < 1e-6, (phi, energy, expected)


def simulate_butane_with_terms(out_prefix, n_molecules=200, n_frames=100, frame_interval_ps=1.0,
                               temperature_k=400.0, extra_terms=DEFAULT_EXTRA, more_forces=(),
                               start_potential=None, seed=DEFAULT_SEED, box_nm=5.0, equilibration_ps=2.0,
                               timestep_fs=2.0, friction_per_ps=5.0, platform="Reference"):
    """Simulate the gas and write ``out_prefix``.pdb and ``out_prefix``.xtc.

    Parameters
    ----------
    extra_terms : sequence of (n, k_kj_mol, delta_deg)
        Periodic terms added to the Ryckaert-Bellemans torsion.
    more_forces : sequence of callables
        ``f(quads) -> openmm.Force``, added too (e.g. a fitted correction).
    start_potential : callable, optional
        ``V(phi_deg)`` in kJ/mol the starting torsions are drawn from (default: V_RB plus
        ``extra_terms``; give another to start out of equilibrium).

    Returns
    -------
    dict of run information.
    """
    import openmm as mm

    t0 = time.time()
    rng = np.random.default_rng(seed)
    start = start_potential or (lambda phi: total_energy_kj_mol(phi, extra_terms))
    phis = sample_torsions_deg(n_molecules, temperature_k, rng, start)
    xyz = np.concatenate([
        rng.random(3) * box_nm
        + me.chain_coordinates(4, me.TRAPPE["bond_nm"], me.TRAPPE["angle_deg"], [phi]) @ me.random_rotation(rng).T
        for phi in phis])
    quads = me._chain_quads(n_molecules, 4)
    system = me.build_butane_rb_system(n_molecules, box_nm)
    system.addForce(periodic_force(quads, extra_terms))
    for make in more_forces:
        system.addForce(make(quads))
    context, integrator = me.start_langevin(system, xyz, temperature_k, friction_per_ps, timestep_fs, seed,
                                            platform=platform)
    steps_per_ps = int(round(1000.0 / timestep_fs))
    integrator.step(int(equilibration_ps * steps_per_ps))
    topology = me.build_topology(n_molecules, 4, "BUT", box_nm)
    pos, box, _ = me._state_arrays(context, True)
    me._remove([out_prefix + ".pdb", out_prefix + ".xtc"])
    me.write_pdb(out_prefix + ".pdb", topology, pos, box)
    me.run_production(context, integrator, out_prefix + ".xtc", topology, n_frames,
                      int(round(frame_interval_ps * steps_per_ps)), wrap="molecules")
    return {"n_molecules": n_molecules, "n_frames": n_frames, "frame_interval_ps": frame_interval_ps,
            "temperature_k": temperature_k, "extra_terms": [list(t) for t in extra_terms], "seed": seed,
            "equilibration_ps": equilibration_ps, "friction_per_ps": friction_per_ps,
            "platform": context.getPlatform().getName(), "openmm_version": mm.__version__,
            "wall_time_s": time.time() - t0}


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--out-prefix", default=os.path.join(HERE, "butane_refit"),
                        help="output files PREFIX.pdb and PREFIX.xtc (default: butane_refit here)")
    parser.add_argument("--molecules", type=int, default=200)
    parser.add_argument("--frames", type=int, default=100)
    parser.add_argument("--interval-ps", type=float, default=1.0)
    parser.add_argument("--temperature-k", type=float, default=400.0)
    parser.add_argument("--extra-k-kj-mol", type=float, default=DEFAULT_EXTRA[0][1])
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED)
    args = parser.parse_args(argv)
    terms = ((1, args.extra_k_kj_mol, 0.0),)
    check_periodic_sign(terms)
    info = simulate_butane_with_terms(args.out_prefix, args.molecules, args.frames, args.interval_ps,
                                      args.temperature_k, terms, seed=args.seed)
    print(json.dumps(info, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
