"""``dihedra ramachandran``: the Ramachandran region of every residue, pooled per residue type."""

from ..analysis.ramachandran import REGIONS, ramachandran_regions
from ..io.resultsdir import load_results
from ..io.outputs import check_earlier_outputs
from .common import add_overwrite_option, format_pm, print_notices, say


def register(sub):
    p = sub.add_parser(
        "ramachandran", help="Ramachandran regions (alpha-R, beta, PPII, alpha-L) per residue and residue type",
        description="Assign every residue in every frame to a Ramachandran region from its (phi, psi) pair "
                    "(region bounds of Beauchamp et al., J. Chem. Theory Comput. 8 (2012) 1409) and write "
                    "ramachandran.csv (per residue, with blocking errors) and ramachandran_by_type.csv "
                    "(pooled per residue type, with the heterogeneity between residues). Needs a folder of "
                    "'dihedra track --torsions protein-backbone --keep-angles'.")
    p.add_argument("folder", metavar="DIR", help="results folder written by 'dihedra track'")
    add_overwrite_option(p, "ramachandran.csv and ramachandran_by_type.csv")
    p.set_defaults(func=run)


def run(args):
    result = load_results(args.folder)
    check_earlier_outputs(result.folder, "dihedra ramachandran", args.overwrite,
                          names=("ramachandran.csv", "ramachandran_by_type.csv"))
    res = ramachandran_regions(result)
    paths = res.save(result.folder)
    by_type = res.regions_by_type
    width = max([4] + [len(t) for t in by_type["type"]])
    print(f"Ramachandran regions of {res.parameters['n_residues']} residues, pooled per residue type "
          "(fraction ± standard error; n/a: not estimable)")
    print(f"{'type':<{width}}  {'n':>4}  " + "  ".join(f"{r:>15}" for r in REGIONS))
    for t, sub in by_type.groupby("type", sort=False):
        key = sub.set_index("region")
        cells = [format_pm(key.loc[r, "population"], key.loc[r, "population_err"]) for r in REGIONS]
        print(f"{t:<{width}}  {int(sub['n_residues'].iloc[0]):>4}  " + "  ".join(f"{c:>15}" for c in cells))
    print_notices(res.notices)
    say("written: " + ", ".join(p.rsplit("/", 1)[-1] for p in paths) + f" in {result.folder}")
