"""``dihedra figures``: publication figures from a results folder (each as soon as its data exist)."""

from ..presentation.figures import FORMATS, WIDTHS, write_figures
from .common import say


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
    p.add_argument("--torsions", nargs="+", metavar="LABEL", default=None,
                   help="torsion labels for the time-series figures and the state raster "
                        "(default: one torsion of each of the first three types; the raster shows all)")
    p.add_argument("--types", nargs="+", metavar="TYPE", default=None,
                   help="torsion types for the per-type figures (default: the first four types)")
    p.set_defaults(func=run)


def run(args):
    paths, skipped = write_figures(args.folder, formats=args.format, width=args.width, torsions=args.torsions,
                                   types=args.types, log=say)
    for path in paths:
        print(path)
    say(f"{len(paths)} figure file(s) written" + (f"; {len(skipped)} figure(s) skipped (see the notes above)"
                                                  if skipped else ""))
