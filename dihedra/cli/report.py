"""``dihedra report``: one self-contained HTML report of a results folder."""

from ..presentation.figures import WIDTHS
from ..presentation.report import write_report
from .common import say


def register(sub):
    p = sub.add_parser(
        "report", help="one self-contained HTML report of a results folder (readable offline, prints to PDF)",
        description="Write report.html: inputs and provenance, torsions, populations, profiles and the "
                    "comparison with a scan (verdicts and cautions), kinetics, couplings, and every figure the "
                    "folder has data for, embedded. No scripts and no external requests.")
    p.add_argument("folder", metavar="DIR", help="results folder")
    p.add_argument("--out", metavar="FILE", default=None, help="HTML file to write (default DIR/report.html)")
    p.add_argument("--width", choices=list(WIDTHS), default="single",
                   help="journal width the figures are drawn at (default single)")
    p.add_argument("--no-figures", action="store_true", help="leave the figures out (faster)")
    p.set_defaults(func=run)


def run(args):
    path = write_report(args.folder, out=args.out, width=args.width, figures=not args.no_figures, log=say)
    print(f"report written to {path}")
