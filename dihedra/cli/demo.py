"""``dihedra demo``: the whole pipeline on the bundled liquid n-hexane example, driven by demo.toml."""

import os

from .. import example_path
from ..errors import DihedraError, OutputExistsError
from ..io.outputs import read_marker
from ..io.tables import read_optional_json
from ..pipeline import RECORD_NAME, load_pipeline, run_pipeline
from .common import say, workers_option

#: The analysis file of the demo (in example_trajectories/, shipped as dihedra.examples).
DEMO_FILE = "demo.toml"


def register(sub):
    p = sub.add_parser(
        "demo", help="run the whole pipeline on the bundled liquid n-hexane example",
        description="Run dihedra on the bundled example (liquid n-hexane, TraPPE-UA, simulated with OpenMM) "
                    "as described by its analysis file demo.toml: track, profile, comparison with the "
                    "TraPPE-UA torsion potential, kinetics, figures and an HTML report.")
    p.add_argument("--out", default="dihedra-demo", metavar="DIR",
                   help="results folder (default ./dihedra-demo; a previous demo folder is replaced)")
    p.add_argument("--workers", type=workers_option, default="auto", metavar="N",
                   help="worker processes of the trajectory pass ('auto', the default: as many as pay); "
                        "results equal a serial run")
    p.set_defaults(func=run)


def run(args):
    out = os.path.abspath(args.out)
    overwrite = is_previous_demo(out)
    if os.path.exists(out) and not overwrite:
        raise OutputExistsError(f"{out} exists and is not a previous demo folder; choose another --out.")
    path = example_path(DEMO_FILE)
    say(f"dihedra demo: liquid n-hexane (100 molecules, TraPPE-UA, 298.15 K), 3 C-C-C-C torsions each; "
        f"steps from {path}")
    pipe = load_pipeline(path, out=out, overwrite=overwrite, overrides={"track": {"workers": args.workers}}, log=say)
    run_pipeline(pipe, log=say)
    report = os.path.join(out, "report.html")
    if os.path.exists(report):
        print(f"report: {report}")
    else:
        print(f"results: {out}")


def is_previous_demo(out):
    """Whether ``out`` is a folder an earlier ``dihedra demo`` made (only those are replaced): a
    results folder whose list of dihedra's files names the record of an analysis run from the
    bundled demo.toml (anything else in it makes the replacement refuse later)."""
    marker = read_marker(out)
    if marker is None or RECORD_NAME not in marker["files"]:
        return False
    try:
        source = str((read_optional_json(out, RECORD_NAME) or {}).get("analysis_file", ""))
    except (DihedraError, AttributeError):
        return False
    return bool(source) and os.path.realpath(source) == os.path.realpath(example_path(DEMO_FILE))
