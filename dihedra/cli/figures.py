"""``dihedra figures``: publication figures from a results folder (each as soon as its data exist)."""

from ..presentation.figures import FORMATS, WIDTHS, write_figures
from ..presentation.figures.figureset import FIGURES_DIR
from ..io.outputs import check_earlier_outputs
from .common import add_overwrite_option, add_types_option, say


def register(sub):
    p = sub.add_parser(
        "figures", help="figures for a paper from a results folder (PDF, PNG, SVG at journal widths)",
        description="Draw every figure the results folder has data for into DIR/figures: angle time series, "
                    "state raster, free-energy profiles (with the scan when compared), populations, 2-D maps, "
                    "transition diagrams, lifetimes, convergence and couplings. Figures whose data are missing "
                    "are skipped with a one-line note. PDF embeds TrueType fonts; PNG is 300 dpi.")
    p.add_argument("folder", metavar="DIR", help="results folder")
    p.add_argument("--format", default="pdf,png", metavar="LIST",
                   help=f"comma-separated file formats: {', '.join(FORMATS)} (default pdf,png)")
    p.add_argument("--width", choices=list(WIDTHS), default="single",
                   help="journal width: single column (3.35 in, default) or double (7 in)")
    add_types_option(p, "torsion types of the per-type figures and the state raster, or single torsions by their "
                        "label for the angle time series (default: the four types whose torsions spend most time "
                        "outside their main state, every torsion in the raster)", former=("--torsions",))
    add_overwrite_option(p, "figures (DIR/figures/)")
    p.set_defaults(func=run)


def run(args):
    check_earlier_outputs(args.folder, "dihedra figures", args.overwrite, prefixes=(FIGURES_DIR,))
    # --overwrite replaces the earlier set: figures of a former selection do not stay beside the new ones
    paths, skipped = write_figures(args.folder, formats=args.format, width=args.width, types=args.types, log=say,
                                   overwrite=args.overwrite)
    for path in paths:
        print(path)
    say(f"{len(paths)} figure file(s) written" + (f"; {len(skipped)} figure(s) skipped (see the notes above)"
                                                  if skipped else ""))
