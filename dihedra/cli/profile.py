"""``dihedra profile``: free-energy profiles, minima, barriers and state free energies of a results folder."""

import os

from ..errors import DihedraError
from ..analysis.profiles.estimation import error_source
from ..analysis.profiles import (DEFAULT_BIN_WIDTH_DEG, DEFAULT_BOOTSTRAP, DEFAULT_PAIR_BIN_WIDTH_DEG, DEFAULT_SEED,
                                 PROFILE_ENERGY_UNITS, check_estimate_options, convert_energy_columns,
                                 free_energy_profiles, unit_suffix)
from ..io.resultsdir import load_results
from ..units import canonical_energy_unit
from ..io.outputs import check_earlier_outputs
from .common import add_overwrite_option, print_notices, say


def register(sub):
    p = sub.add_parser(
        "profile", help="free-energy profiles F = -kT ln p per torsion and type, minima, barriers, state dG",
        description="Free-energy profiles from the angle histograms of a results folder (histogram and von "
                    "Mises kernel estimates, block-bootstrap errors), their minima and barriers, state free "
                    "energies, and 2-D profiles of torsion pairs. Writes profiles.csv, minima.csv, "
                    "barriers.csv, state_free_energies.csv, profiles.json (and profiles_2d.csv) into DIR.")
    p.add_argument("folder", metavar="DIR", help="results folder written by 'dihedra track' or 'dihedra windows'")
    p.add_argument("--temperature", type=float, default=None, metavar="K",
                   help="temperature in kelvin (required unless track recorded one)")
    p.add_argument("--bin-width", type=float, default=DEFAULT_BIN_WIDTH_DEG, metavar="DEG",
                   help=f"histogram bin width, a divisor of 360 (default {DEFAULT_BIN_WIDTH_DEG:g})")
    p.add_argument("--bandwidth", type=float, default=None, metavar="DEG",
                   help="von Mises kernel standard deviation (default: a rule of thumb, see the docs; "
                        "the value used is printed and written)")
    p.add_argument("--energy-unit", default="kJ/mol", metavar="UNIT",
                   help="unit of the free energies written and printed: kJ/mol (default), kcal/mol or kT")
    p.add_argument("--pair", nargs=2, action="append", metavar=("TORSION_A", "TORSION_B"),
                   help="2-D profile of two torsion labels, or two torsion types pooled over molecules "
                        "(repeatable; needs a folder tracked with --keep-angles)")
    p.add_argument("--pair-bin-width", type=float, default=DEFAULT_PAIR_BIN_WIDTH_DEG, metavar="DEG",
                   help=f"bin width of 2-D profiles (default {DEFAULT_PAIR_BIN_WIDTH_DEG:g})")
    p.add_argument("--bootstrap", type=int, default=DEFAULT_BOOTSTRAP, metavar="N",
                   help=f"block-bootstrap resamples for the errors (default {DEFAULT_BOOTSTRAP}; the types of a "
                        "folder of 'dihedra windows' carry the errors of the windows' own bootstrap)")
    p.add_argument("--seed", type=int, default=DEFAULT_SEED, metavar="N", help="seed of the bootstrap")
    which = p.add_mutually_exclusive_group()
    which.add_argument("--types-only", action="store_true",
                       help="profile only the types (pooled), not every torsion (faster for large systems)")
    which.add_argument("--per-torsion", action="store_true",
                       help=f"profile every torsion as well as the types, however many (without either option: "
                            f"every torsion up to {PER_TORSION_LIMIT:,} torsions, the types alone above)")
    add_overwrite_option(p, "profile files (profiles.csv ... profiles.json)")
    p.set_defaults(func=run)


#: The files of 'dihedra profile'.
OUTPUTS = ("profiles.csv", "minima.csv", "barriers.csv", "state_free_energies.csv", "profiles_2d.csv", "profiles.json")


def run(args):
    unit = canonical_energy_unit(args.energy_unit)
    if unit not in PROFILE_ENERGY_UNITS:
        raise DihedraError(f"--energy-unit must be kJ/mol, kcal/mol or kT for profiles; got {args.energy_unit!r}.")
    check_estimate_options(args.bootstrap, args.bandwidth)   # before any work or note
    result = load_results(args.folder)
    check_earlier_outputs(result.folder, "dihedra profile", args.overwrite, names=OUTPUTS)
    n = len(result.torsion_set)
    per_torsion = args.per_torsion or (not args.types_only and n <= PER_TORSION_LIMIT)
    if not (per_torsion or args.types_only):
        say(f"note: profiles of the types only: {n:,} torsions are more than {PER_TORSION_LIMIT:,} (every torsion's "
            f"profile would add about {n * 40 / 1000:.0f} MB to profiles.csv and slow figures and report); "
            "--per-torsion writes them.")
    pset = free_energy_profiles(result, temperature_k=args.temperature, bin_width_deg=args.bin_width,
                                bandwidth_deg=args.bandwidth, n_bootstrap=args.bootstrap, seed=args.seed,
                                per_torsion=per_torsion, pairs=args.pair,
                                pair_bin_width_deg=args.pair_bin_width, log=say)
    paths = pset.save(result.folder, unit)
    report_profiles(pset, unit)
    print_notices(pset.notices)
    print("written: " + ", ".join(p.rsplit("/", 1)[-1] for p in paths) + f" in {result.folder}")
    csv = os.path.join(result.folder, "profiles.csv")
    if per_torsion and os.path.exists(csv) and os.path.getsize(csv) > LARGE_TABLE_BYTES:
        say(f"note: profiles.csv holds every torsion's profile ({os.path.getsize(csv) / 1e6:.0f} MB for "
            f"{n} torsions); --types-only writes the types' alone.")


#: Above this size of profiles.csv, ``profile`` points at --types-only.
LARGE_TABLE_BYTES = 100_000_000
#: Without --per-torsion or --types-only, every torsion is profiled up to this many torsions (about
#: 40 kB of profiles.csv each: 80 MB at the limit), the types alone above.
PER_TORSION_LIMIT = 2000


def report_profiles(pset, unit, max_types=20):
    s = pset.settings
    sfx = unit_suffix(unit)
    print(f"free-energy profiles at {pset.temperature_k:g} K (kT = {s['kt_kj_mol']:.3f} kJ/mol), "
          f"{s['bin_width_deg']:g}-degree bins, {error_source(s)}; energies in {unit}")
    minima = convert_energy_columns(pset.minima[pset.minima["torsion"] == ""], unit, pset.temperature_k)
    barriers = convert_energy_columns(pset.barriers[pset.barriers["torsion"] == ""], unit, pset.temperature_k)
    dg = convert_energy_columns(pset.state_free_energies[pset.state_free_energies["torsion"] == ""], unit,
                                pset.temperature_k)
    for k, (typ, (_, kern)) in enumerate(pset.by_type.items()):
        if k == max_types:
            print(f"... and {len(pset.by_type) - max_types} more types (see minima.csv, barriers.csv)")
            break
        print(f"\ntype {typ} (kernel bandwidth {kern.bandwidth_deg:.2f} deg)")
        for r in minima[minima["type"] == typ].itertuples(index=False):
            print(f"  minimum  {r.angle_deg:7.1f} ± {r.angle_err_deg:.1f} deg   F = "
                  f"{_pm(getattr(r, 'free_energy_' + sfx), getattr(r, 'free_energy_err_' + sfx))}")
        for r in barriers[barriers["type"] == typ].itertuples(index=False):
            print("  " + _barrier_line(r, sfx))
        for r in dg[dg["type"] == typ].itertuples(index=False):
            print(f"  state    {r.state:<10} p = {_pm(r.population, r.population_err, 3)}   dG vs {r.reference_state} = "
                  f"{_pm(getattr(r, 'free_energy_' + sfx), getattr(r, 'free_energy_err_' + sfx))}")


def _barrier_line(r, sfx):
    """One barrier of the printed summary (a row of the barrier table, energies with suffix ``sfx``).

    A profile with one minimum has one barrier, the highest point on the way around the circle from
    that minimum back to it: said so, with one height (from a minimum to itself both are the same).
    """
    one = abs((r.to_minimum_deg - r.from_minimum_deg + 180.0) % 360.0 - 180.0) < 1e-9
    if one:
        where = f"around the circle from the only minimum ({r.from_minimum_deg:.0f} deg) back to it"
    else:
        where = f"between {r.from_minimum_deg:.0f} and {r.to_minimum_deg:.0f} deg"
    if not r.sampled:
        return f"barrier  near {r.angle_deg:5.0f} deg {where}: not sampled (higher than any sampled value)"
    value = _pm(getattr(r, "free_energy_" + sfx), getattr(r, "free_energy_err_" + sfx))
    first = _pm(getattr(r, "height_from_first_" + sfx), getattr(r, "height_from_first_err_" + sfx))
    if one:
        return f"barrier  {r.angle_deg:7.1f} ± {r.angle_err_deg:.1f} deg   F = {value}  ({where}; height {first})"
    second = _pm(getattr(r, "height_from_second_" + sfx), getattr(r, "height_from_second_err_" + sfx))
    return (f"barrier  {r.angle_deg:7.1f} ± {r.angle_err_deg:.1f} deg   F = {value}  ({where}; height {first} / "
            f"{second} from each side)")


def _pm(value, err, digits=2):
    from .common import format_pm
    return format_pm(float(value), float(err), digits)
