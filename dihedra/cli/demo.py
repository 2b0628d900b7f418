"""``dihedra demo``: the whole pipeline on the bundled liquid n-hexane example."""

import os

from .. import example_path
from ..errors import OutputExistsError
from ..tracking import track
from .common import say
from .track import report_track


def register(sub):
    p = sub.add_parser(
        "demo", help="run the whole pipeline on the bundled liquid n-hexane example",
        description="Run dihedra on the bundled example (liquid n-hexane, TraPPE-UA, simulated with "
                    "OpenMM) and write a results folder.")
    p.add_argument("--out", default="dihedra-demo", metavar="DIR",
                   help="results folder (default ./dihedra-demo; a previous demo folder is replaced)")
    p.add_argument("--workers", type=int, default=1, metavar="N", help="worker processes")
    p.set_defaults(func=run)


def run(args):
    out = os.path.abspath(args.out)
    overwrite = _is_previous_demo(out)
    if os.path.exists(out) and not overwrite:
        raise OutputExistsError(f"{out} exists and is not a previous demo folder; choose another --out.")
    say("dihedra demo: liquid n-hexane (100 molecules, TraPPE-UA, 298.15 K), 3 C-C-C-C torsions each")
    result = track(example_path("hexane.pdb"), [example_path("hexane.xtc")], torsions=["rotatable"],
                   scheme="anti-gauche", out=out, overwrite=overwrite, temperature_k=298.15,
                   workers=args.workers, log=say)
    report_track(result)


def _is_previous_demo(out):
    import json
    path = os.path.join(out, "summary.json")
    if not os.path.exists(path):
        return False
    try:
        with open(path) as fh:
            return "dihedra_version" in json.load(fh)
    except (OSError, ValueError):
        return False
