"""``dihedra scan``: compute a relaxed torsion scan (MMFF94 or GFN2-xTB) and write a scan CSV."""

import os

from ..analysis.scans import (check_scan_output, mmff94_scan, molecule_from_topology, scan_angles, write_scan_csv,
                              xtb_scan)
from ..analysis.scans.computed import XTB_GRADIENT_TOLERANCE
from ..analysis.scans.files import sidecar_path
from .common import say

METHODS = ("mmff94", "gfn2-xtb")


def register(sub):
    p = sub.add_parser(
        "scan", help="compute a relaxed torsion scan (MMFF94 with RDKit, GFN2-xTB with tblite)",
        description="Compute a relaxed scan of one torsion of the molecule it belongs to (built from an "
                    "all-atom topology with elements and hydrogens, coordinates of the first frame) and "
                    "write it as a scan CSV (angle_deg, energy_kj_mol) with its method, kind and inputs in "
                    "a JSON file beside it (scan.csv -> scan.json); 'dihedra compare --scan' reads both. "
                    "Needs the scan extras: pip install \"dihedra[scan]\".")
    p.add_argument("topology", help="all-atom topology with elements and hydrogens (PDB, PSF, TPR, ...)")
    p.add_argument("trajectory", nargs="?", default=None, metavar="TRAJ",
                   help="optional trajectory whose first frame gives the coordinates")
    p.add_argument("--torsion", required=True, metavar="A,B,C,D", help="four 0-based atom indices")
    p.add_argument("--method", required=True, choices=METHODS, help="mmff94 or gfn2-xtb")
    p.add_argument("--out", required=True, metavar="FILE", help="scan CSV to write (and its metadata beside it, "
                                                                     "the same name with .json)")
    p.add_argument("--step", type=float, default=None, metavar="DEG",
                   help="scan spacing, a divisor of 360 (default 10 for mmff94, 30 for gfn2-xtb)")
    p.add_argument("--charge", type=int, default=0, metavar="Q", help="total charge (gfn2-xtb; default 0)")
    p.add_argument("--unpaired", type=int, default=0, metavar="N",
                   help="unpaired electrons (gfn2-xtb; default 0)")
    p.add_argument("--gradient-tolerance", type=float, default=XTB_GRADIENT_TOLERANCE, metavar="EH_PER_BOHR",
                   help=f"gfn2-xtb: a point is relaxed when no gradient component exceeds this, in hartree/bohr "
                        f"(default {XTB_GRADIENT_TOLERANCE:g})")
    p.add_argument("--overwrite", action="store_true",
                   help="replace an existing --out file (only a scan that dihedra wrote)")
    p.set_defaults(func=run)


def run(args):
    out = check_scan_output(args.out, overwrite=args.overwrite, inputs=[args.topology, args.trajectory])
    mol, local = molecule_from_topology(args.topology, args.torsion, args.trajectory)
    step = args.step if args.step is not None else (10.0 if args.method == "mmff94" else 30.0)
    scan_angles(step)   # (refused before the banner: nothing runs with a step that does not divide 360)
    say(f"{args.method} relaxed scan of torsion {args.torsion} ({mol.GetNumAtoms()} atoms), every {step:g} deg")

    def progress(done, total, angle, energy):
        say(f"  point {done}/{total}: {angle:7.1f} deg  E = {energy:.3f} kJ/mol")

    if args.method == "mmff94":
        scan = mmff94_scan(mol, local, step_deg=step, progress=progress)
    else:
        scan = xtb_scan(mol, local, step_deg=step, charge=args.charge, unpaired=args.unpaired,
                        gradient_tolerance=args.gradient_tolerance, progress=progress)
    write_scan_csv(scan, out, extra={"topology": os.path.abspath(args.topology),
                                     "torsion_atoms": args.torsion}, overwrite=args.overwrite)
    print(f"{len(scan.angle_deg)} points, lowest at {scan.angle_deg[scan.energy_kj_mol.argmin()]:g} deg, "
          f"highest {scan.energy_kj_mol.max():.2f} kJ/mol above it")
    for a, e in zip(scan.angle_deg, scan.energy_kj_mol):
        print(f"  {a:7.1f} deg  {e:8.3f} kJ/mol")
    if "gradient_tolerance_hartree_bohr" in scan.metadata:
        print_relaxation(scan.metadata)
    print(f"written: {out} (metadata: {sidecar_path(out)})")


#: A mirror asymmetry above this (kJ/mol) is pointed out.
MIRROR_ASYMMETRY_NOTE_KJ_MOL = 0.05


def print_relaxation(meta):
    """How far the relaxation of a GFN2-xTB scan went (its metadata, see xtb_scan)."""
    print(f"relaxed to a gradient tolerance of {meta['gradient_tolerance_hartree_bohr']:g} hartree/bohr: largest "
          f"remaining gradient component {meta['largest_remaining_gradient_hartree_bohr']:.2g} hartree/bohr, largest "
          f"energy change of a last step {meta['largest_last_step_energy_change_kj_mol']:.2g} kJ/mol")
    if meta["above_tolerance_angles_deg"]:
        say(f"note: at {', '.join(f'{a:g}' for a in meta['above_tolerance_angles_deg'])} deg the optimiser stopped "
            "(iteration limit or failed line search) with a gradient above the tolerance; see the metadata")
    if "mirror_asymmetry_kj_mol" in meta:
        worst, where = meta["mirror_asymmetry_kj_mol"], meta["mirror_asymmetry_angle_deg"]
        print(f"mirror asymmetry {worst:.3f} kJ/mol (|E(phi) - E(-phi)| at +-{where:g} deg; the molecule is its own "
              "mirror image, so an exact relaxed scan has 0)")
        if worst > MIRROR_ASYMMETRY_NOTE_KJ_MOL:
            say(f"note: E(phi) and E(-phi) differ by up to {worst:.2f} kJ/mol: the points are not fully relaxed (or "
                "reached different local minima); a smaller --gradient-tolerance relaxes them further")
