"""One-file pipelines: keys read from the subcommand parsers, unknown keys named, paths relative to
the file, the file copied into the results folder, and the demo's own file."""

import argparse
import json
import os
import re

import pandas as pd
import pytest
from figure_data import SCAN_TOML, make_system

from dihedra import example_path
from dihedra.cli import build_parser, main
from dihedra.errors import DihedraError
from dihedra.pipeline import (COPY_NAME, RECORD_NAME, load_pipeline, run_pipeline, step_spec,
                              subcommand_parsers)


def help_options(name):
    """Long options of a subcommand as its --help text prints them (the reference, independent of
    the pipeline's reading of the parser)."""
    parser = subcommand_parsers()[name]
    text = parser.format_help()
    found = re.findall(r"^ {2}(?:-\w[^,]*, )?(--[a-z][a-z0-9-]*)", text, flags=re.M)  # the option lines
    return {o[2:].replace("-", "_") for o in found} - {"help"}


@pytest.mark.parametrize("name", ["track", "windows", "profile", "compare", "kinetics", "couplings", "figures",
                                  "report"])
def test_valid_keys_are_exactly_the_options_of_the_subcommand(name):
    spec = step_spec(name, subcommand_parsers()[name])
    parser = subcommand_parsers()[name]
    positionals = {a.dest for a in parser._actions if not a.option_strings} - {spec.folder_key}
    options = help_options(name) - ({"out"} if spec.creates_folder else set())
    assert set(spec.valid_keys) == options | positionals
    if name == "track":
        assert spec.creates_folder and {"topology", "trajectories", "keep_angles", "torsions"} <= set(spec.valid_keys)
        assert "out" not in spec.valid_keys
    elif name == "windows":
        assert spec.creates_folder and {"windows", "temperature"} <= set(spec.valid_keys)
    else:
        assert spec.folder_key == "folder" and "folder" not in spec.valid_keys


def write(path, text):
    with open(path, "w") as fh:
        fh.write(text)
    return str(path)


def test_unknown_key_names_the_key_and_the_valid_ones(tmp_path):
    toml = write(tmp_path / "a.toml", 'out = "res"\n[track]\ntopology = "t.pdb"\ntrajectories = ["x.xtc"]\n'
                                      "keep_angle = true\n")
    with pytest.raises(DihedraError) as err:
        load_pipeline(toml)
    msg = str(err.value)
    valid = step_spec("track", subcommand_parsers()["track"]).valid_keys
    assert "unknown key 'keep_angle'" in msg and "[track]" in msg
    assert msg.endswith(", ".join(valid) + ".")
    toml = write(tmp_path / "b.toml", 'out = "res"\ntitle = "x"\n[report]\n')
    with pytest.raises(DihedraError,
                       match="unknown top-level key 'title'; valid top-level keys are base_dir, out, steps"):
        load_pipeline(toml)
    toml = write(tmp_path / "c.toml", 'out = "res"\n[plot]\n')
    with pytest.raises(DihedraError, match=r"unknown table \[plot\]"):
        load_pipeline(toml)


def test_value_types_and_pipeline_owned_keys_are_checked(tmp_path):
    os.makedirs(tmp_path / "res")
    cases = {'[profile]\ntypes_only = "yes"': "is a switch: give true or false",
             "[profile]\nbin_width = [5, 10]": "takes one value",
             '[profile]\nbin_width = "five"': "invalid float value: 'five'",
             '[profile]\nfolder = "elsewhere"': "set by the pipeline from the top-level 'out'",
             "[profile]\npair = [[\"a\", \"b\", \"c\"]]": "takes 2 values per entry",
             '[figures]\nwidth = "A4"': "invalid choice: 'A4'"}
    for k, (table, message) in enumerate(cases.items()):
        toml = write(tmp_path / f"t{k}.toml", f'out = "res"\n{table}\n')
        with pytest.raises(DihedraError, match=re.escape(message)):
            load_pipeline(toml)


def test_dashes_or_underscores_and_relative_paths(tmp_path, monkeypatch):
    sub = tmp_path / "project"
    os.makedirs(sub)
    write(sub / "sectors.toml", '[[state]]\nlabel = "trans"\nfrom_deg = 90\nto_deg = -90\n'
                                '[[state]]\nlabel = "cis"\nfrom_deg = -90\nto_deg = 90\n')
    head = 'out = "res"\n[track]\ntopology = "in/top.pdb"\ntrajectories = ["in/r0.xtc", "in/r1.xtc"]\n'
    rest = 'scheme = "sectors.toml"\ntorsions = ["rotatable"]\n'
    a = write(sub / "a.toml", head + rest + "keep-angles = true\ndt-ps = 2.5\n")
    b = write(sub / "b.toml", head + rest + "keep_angles = true\ndt_ps = 2.5\n")
    monkeypatch.chdir(tmp_path)  # somewhere else: paths are relative to the file, not to the cwd
    pa, pb = load_pipeline(a), load_pipeline(b)
    assert pa.steps[0].argv == pb.steps[0].argv
    argv = pa.steps[0].argv
    assert argv[:3] == [str(sub / "in" / "top.pdb"), str(sub / "in" / "r0.xtc"), str(sub / "in" / "r1.xtc")]
    assert "--keep-angles" in argv and argv[argv.index("--scheme") + 1] == str(sub / "sectors.toml")
    assert argv[argv.index("--torsions") + 1] == "rotatable"  # a spec, not a file: left alone
    assert argv[argv.index("--dt-ps") + 1] == "2.5"
    assert argv[-2:] == ["--out", str(sub / "res")] and pa.out == str(sub / "res")
    # the parsed arguments are what 'dihedra track' would get on the command line
    ns = build_parser().parse_args(["track", *argv])
    assert ns.keep_angles is True and ns.dt_ps == 2.5 and ns.torsions == ["rotatable"]


def test_steps_order_arrays_of_tables_and_dry_run(tmp_path, capsys):
    os.makedirs(tmp_path / "res")
    toml = write(tmp_path / "p.toml", 'out = "res"\nsteps = ["report", "compare"]\n'
                                      '[[compare]]\nscan = "s1.toml"\n[[compare]]\nscan = "s2.toml"\ntype = ["all"]\n'
                                      "[kinetics]\n")
    pipe = load_pipeline(toml)
    assert [s.name for s in pipe.steps] == ["report", "compare", "compare"]
    assert pipe.steps[1].argv == [str(tmp_path / "res"), "--scan", str(tmp_path / "s1.toml")]
    assert pipe.steps[2].argv[-2:] == ["--type", "all"]
    assert main(["run", toml, "--dry-run"]) == 0
    captured = capsys.readouterr()
    assert captured.out.splitlines()[0] == f"dihedra report {tmp_path / 'res'}"
    assert "table [kinetics] is not listed in steps" in captured.err
    # without steps, the tables run in the documented order whatever the file order
    toml = write(tmp_path / "q.toml", 'out = "res"\n[report]\n[figures]\n[profile]\n')
    assert [s.name for s in load_pipeline(toml).steps] == ["profile", "figures", "report"]


def test_run_executes_the_steps_and_copies_the_file_into_the_results_folder(tmp_path, monkeypatch, capsys):
    data = tmp_path / "data"
    os.makedirs(data)
    top, trajs = make_system(str(data), n_frames=120, n_molecules=3)
    write(tmp_path / "scan.toml", SCAN_TOML)
    text = (f'# my analysis\nout = "results"\n\n[track]\ntopology = "data/{os.path.basename(top)}"\n'
            f'trajectories = {json.dumps(["data/" + os.path.basename(t) for t in trajs])}\n'
            'torsions = ["rotatable"]\ntemperature = 300.0\nkeep_angles = true\n\n'
            '[profile]\nbootstrap = 30\ntypes_only = true\n\n[compare]\nscan = "scan.toml"\nbootstrap = 30\n\n'
            '[kinetics]\nbootstrap = 20\nlag = [1, 2]\n\n[figures]\nformat = "png"\n\n[report]\n')
    toml = write(tmp_path / "analysis-file.toml", text)
    monkeypatch.chdir(data)
    assert main(["run", toml]) == 0
    out = tmp_path / "results"
    for name in ("summary.json", "profiles.csv", "comparison.csv", "transitions.csv", "report.html",
                 os.path.join("figures", "populations.png")):
        assert (out / name).exists(), name
    copy = (out / COPY_NAME).read_text()
    assert copy.endswith(text)  # the file itself, verbatim, after a header
    assert f'base_dir = "{tmp_path}"' in copy
    record = json.loads((out / RECORD_NAME).read_text())
    assert [s["step"] for s in record["steps"]] == ["track", "profile", "compare", "kinetics", "figures", "report"]
    assert all(s["status"] == "done" for s in record["steps"])
    import hashlib
    assert record["sha256"] == hashlib.sha256(text.encode()).hexdigest()
    assert "my analysis" in (out / "report.html").read_text()  # the report shows the analysis file
    # the copy reruns from anywhere (its base_dir points at the inputs) and gives the same populations
    before = pd.read_csv(out / "populations.csv")
    monkeypatch.chdir(tmp_path.parent)
    pipe = load_pipeline(str(out / COPY_NAME), out=str(tmp_path / "again"))
    assert pipe.steps[0].argv[0] == top
    run_pipeline(pipe)
    pd.testing.assert_frame_equal(pd.read_csv(tmp_path / "again" / "populations.csv"), before)
    assert (tmp_path / "again" / COPY_NAME).exists()
    # an existing folder is refused unless --overwrite
    assert main(["run", toml]) == 2
    assert "already exists" in capsys.readouterr().err


def test_a_failing_step_is_named_and_recorded(tmp_path, capsys):
    data = tmp_path / "data"
    os.makedirs(data)
    top, trajs = make_system(str(data), n_replicas=1, n_frames=40, n_molecules=2)
    toml = write(tmp_path / "f.toml",
                 f'out = "res"\n[track]\ntopology = "{top}"\ntrajectories = ["{trajs[0]}"]\ntorsions = ["rotatable"]\n'
                 '[compare]\nscan = "missing-scan.csv"\nangle_unit = "deg"\nenergy_unit = "kJ/mol"\n')
    assert main(["run", toml]) == 2
    err = capsys.readouterr().err
    assert "step compare (f.toml, [compare]) failed" in err
    record = json.loads((tmp_path / "res" / RECORD_NAME).read_text())
    assert [(s["step"], s["status"]) for s in record["steps"]] == [("track", "done"), ("compare", "failed")]


# ------------------------------------------------------------------------------------------------
# the demo
# ------------------------------------------------------------------------------------------------
def test_the_demo_file_is_a_valid_analysis_of_the_bundled_example():
    path = example_path("demo.toml")
    pipe = load_pipeline(path, out="/nonexistent/demo-out")
    names = [s.name for s in pipe.steps]
    assert names == ["track", "profile", "compare", "kinetics", "figures", "report"]
    track = pipe.steps[0].argv
    assert track[0] == example_path("hexane.pdb") and "--keep-angles" in track
    compare = pipe.steps[2].argv
    assert compare[compare.index("--scan") + 1] == example_path("trappe_ua_torsion.toml")
    assert not pipe.notes  # every step exists in this version


def test_the_trappe_scan_file_is_the_trappe_potential():
    from dihedra.analysis.scans import read_scan

    # TraPPE-UA (Martin & Siepmann 1998; from memory, as in make_examples.py):
    # V = c1 (1 + cos phi) + c2 (1 - cos 2 phi) + c3 (1 + cos 3 phi), c/k_B = 355.03, -68.19, 791.32 K
    import numpy as np

    r = 1.380649e-23 * 6.02214076e23 / 1000.0  # CODATA 2018
    phi = np.radians(np.arange(-180.0, 180.0, 7.5))
    v = r * (355.03 * (1 + np.cos(phi)) - 68.19 * (1 - np.cos(2 * phi)) + 791.32 * (1 + np.cos(3 * phi)))
    scan = read_scan(example_path("trappe_ua_torsion.toml"))
    e = scan.energy_at(np.degrees(phi))
    np.testing.assert_allclose(e - e.min(), v - v.min(), atol=1e-5)


def test_demo_does_not_take_a_record_that_dihedra_did_not_write(tmp_path):
    from dihedra.cli.demo import is_previous_demo

    out = tmp_path / "demo"
    os.makedirs(out)
    (out / RECORD_NAME).write_text(json.dumps({"analysis_file": example_path("demo.toml")}))
    assert not is_previous_demo(str(out))   # no list of dihedra's files


def test_demo_replaces_only_a_previous_demo_folder(tmp_path, capsys):
    other = tmp_path / "mine"
    os.makedirs(other)
    (other / "notes.txt").write_text("keep me")
    assert main(["demo", "--out", str(other)]) == 2
    assert "not a previous demo folder" in capsys.readouterr().err
    assert (other / "notes.txt").read_text() == "keep me"


@pytest.mark.slow
@pytest.mark.skipif(not os.path.exists(example_path("hexane.xtc")), reason="the example trajectory is not there")
def test_demo_runs_every_step_and_ends_with_the_report(tmp_path, capsys):
    out = tmp_path / "demo"
    assert main(["demo", "--out", str(out)]) == 0
    captured = capsys.readouterr()
    assert captured.out.strip().splitlines()[-1] == f"report: {out / 'report.html'}"
    for name in ("comparison.csv", "transitions.csv", "profiles_2d.csv", COPY_NAME, RECORD_NAME,
                 os.path.join("figures", "state_raster.pdf")):
        assert (out / name).exists(), name
    from dihedra.cli.demo import is_previous_demo
    assert is_previous_demo(str(out))  # so a second demo may replace it


def test_demo_replaces_a_previous_demo_folder(tmp_path, monkeypatch):
    import dihedra.cli.demo as demo

    from dihedra.io.outputs import MARKER

    out = tmp_path / "demo"
    os.makedirs(out)
    # a folder an earlier demo made: its list of dihedra's files names the record of the demo's run
    (out / RECORD_NAME).write_text(json.dumps({"analysis_file": example_path("demo.toml")}))
    (out / MARKER).write_text(json.dumps({"run_id": "x", "files": [RECORD_NAME]}))
    seen = {}
    monkeypatch.setattr(demo, "run_pipeline", lambda pipe, log=None: seen.setdefault("argv", pipe.steps[0].argv))
    assert main(["demo", "--out", str(out), "--workers", "2"]) == 0
    argv = seen["argv"]
    assert "--overwrite" in argv and argv[argv.index("--workers") + 1] == "2"
    assert argv[-2:] == ["--out", str(out)]


def test_argparse_internals_used_by_the_pipeline_are_there():
    # the pipeline reads the subparsers through argparse's _SubParsersAction (a stable internal)
    parser = build_parser()
    assert any(isinstance(a, argparse._SubParsersAction) for a in parser._actions)


def test_the_full_example_of_the_docs_is_a_valid_analysis_file(tmp_path):
    docs = os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))), "docs", "pipelines.md")
    text = open(docs).read()
    block = re.search(r"## A full example\s+```toml\n(.*?)```", text, flags=re.S).group(1)
    pipe = load_pipeline(write(tmp_path / "analysis.toml", block))
    assert [s.name for s in pipe.steps] == ["track", "profile", "compare", "kinetics", "couplings", "figures",
                                           "report"]
    assert pipe.steps[0].argv[:3] == [str(tmp_path / "inputs" / x) for x in ("hexane.pdb", "run1.xtc", "run2.xtc")]
