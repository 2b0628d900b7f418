"""One-file pipelines: tables mapped onto the Python API's keyword arguments (read from the
functions' signatures), unknown keys named, paths relative to the file, every table checked before
the first step, the file copied into the results folder, and the demo's own file."""

import inspect
import json
import os
import re

import pandas as pd
import pytest
from figure_data import SCAN_TOML, make_system

import dihedra
from dihedra import example_path
from dihedra.cli import main
from dihedra.errors import DihedraError
from dihedra.pipeline import COPY_NAME, RECORD_NAME, STEPS, load_pipeline, run_pipeline


@pytest.mark.parametrize("name, func, inputs", [
    ("track", dihedra.track, set()), ("profile", dihedra.free_energy_profiles, {"energy_unit"}),
    ("kinetics", dihedra.state_kinetics, set()), ("windows", dihedra.unbias_windows, set())])
def test_valid_keys_are_the_keyword_arguments_of_the_api(name, func, inputs):
    # the reference: the function's own signature, less what the pipeline sets itself
    own = {"result", "out", "overwrite", "log", "progress", "barriers", "profile_temperature_k"}
    expected = set(inspect.signature(func).parameters) - own
    assert set(STEPS[name].keys) == expected | inputs


def write(path, text):
    with open(path, "w") as fh:
        fh.write(text)
    return str(path)


def test_unknown_key_names_the_key_suggests_one_and_lists_the_valid_ones(tmp_path):
    toml = write(tmp_path / "a.toml", 'out = "res"\n[track]\ntopology = "t.pdb"\ntrajectories = ["x.xtc"]\n'
                                      "temperature = 300\n")
    with pytest.raises(DihedraError) as err:
        load_pipeline(toml)
    msg = str(err.value)
    assert "[track]: unknown key 'temperature' (did you mean 'temperature_k'?)" in msg
    assert msg.endswith(", ".join(sorted(STEPS["track"].keys)) + ".")
    toml = write(tmp_path / "b.toml", 'out = "res"\ntitle = "x"\n[report]\n')
    with pytest.raises(DihedraError,
                       match="unknown top-level key 'title'; valid top-level keys are base_dir, out, steps"):
        load_pipeline(toml)
    toml = write(tmp_path / "b2.toml", 'out = "res"\nstep = ["report"]\n[report]\n')
    with pytest.raises(DihedraError, match="unknown top-level key 'step' \\(did you mean 'steps'\\?\\)"):
        load_pipeline(toml)
    toml = write(tmp_path / "b3.toml", 'out = "res"\nsteps = ["reprot"]\n[report]\n')
    with pytest.raises(DihedraError, match="unknown step 'reprot' in steps \\(did you mean 'report'\\?\\)"):
        load_pipeline(toml)
    toml = write(tmp_path / "c.toml", 'out = "res"\n[plot]\n')
    with pytest.raises(DihedraError, match=r"unknown table \[plot\]"):
        load_pipeline(toml)


def test_values_inputs_and_pipeline_owned_keys_are_checked_before_anything_runs(tmp_path):
    os.makedirs(tmp_path / "res")
    for name in ("t.pdb", "x.xtc"):   # (inputs that exist: the value of workers is what is refused)
        write(tmp_path / name, "")
    cases = {'[profile]\nper_torsion = "yes"': "is a switch: give true or false",
             "[profile]\nbin_width_deg = [5, 10]": "takes a number",
             '[profile]\nbin_width_deg = "five"': "takes a number",
             "[profile]\nbin_width_deg = 7": "[profile]: the bin_width_deg must be a multiple",
             '[profile]\nresult = "elsewhere"': "set by the pipeline from the top-level 'out'",
             '[compare]\nscan = "missing.toml"': "scan 'missing.toml' does not exist",
             '[compare]\ntypes = ["all"]': "give scan",
             '[couplings]\nselect = ["x"]': "needs relation",
             '[track]\ntopology = "t.pdb"\ntrajectories = ["x.xtc"]\nworkers = 0': "workers must be 'auto' or a whole number of at least 1",
             '[track]\ntopology = "t.pdb"\ntrajectories = ["x.xtc"]\nworkers = "many"': "workers must be 'auto' or a whole number"}
    for k, (table, message) in enumerate(cases.items()):
        toml = write(tmp_path / f"t{k}.toml", f'out = "res"\n{table}\n')
        with pytest.raises(DihedraError, match=re.escape(message)):
            load_pipeline(toml)


def test_dashes_or_underscores_relative_paths_and_names_that_are_never_paths(tmp_path, monkeypatch):
    sub = tmp_path / "project"
    os.makedirs(sub / "in")
    for name in ("top.pdb", "r0.xtc", "r1.xtc"):
        write(sub / "in" / name, "")
    write(sub / "sectors.toml", '[[state]]\nlabel = "trans"\nfrom_deg = 90\nto_deg = -90\n'
                                '[[state]]\nlabel = "cis"\nfrom_deg = -90\nto_deg = 90\n')
    write(sub / "rotatable", "a file named like a specification")
    write(sub / "klyne-prelog", "and one named like a scheme")
    head = 'out = "res"\n[track]\ntopology = "in/top.pdb"\ntrajectories = ["in/r0.xtc", "in/r1.xtc"]\n'
    a = write(sub / "a.toml", head + 'scheme = "sectors.toml"\ntorsions = ["rotatable"]\nkeep-angles = true\n'
                                     "dt-ps = 2.5\n")
    b = write(sub / "b.toml", head + 'scheme = "klyne-prelog"\ntorsions = ["rotatable"]\nkeep_angles = true\n'
                                     "dt_ps = 2.5\n")
    monkeypatch.chdir(tmp_path)  # somewhere else: paths are relative to the file, not to the cwd
    args = load_pipeline(a).steps[0].arguments
    assert args["topology"] == str(sub / "in" / "top.pdb")
    assert args["trajectories"] == [str(sub / "in" / "r0.xtc"), str(sub / "in" / "r1.xtc")]
    assert args["scheme"] == str(sub / "sectors.toml") and args["torsions"] == ["rotatable"]
    assert args["keep_angles"] is True and args["dt_ps"] == 2.5
    other = load_pipeline(b).steps[0].arguments
    assert other["scheme"] == "klyne-prelog" and other["torsions"] == ["rotatable"]   # names, not files
    assert load_pipeline(a).out == str(sub / "res")


def test_steps_order_arrays_of_tables_and_dry_run(tmp_path, capsys):
    os.makedirs(tmp_path / "res")
    for name in ("s1.toml", "s2.toml"):
        write(tmp_path / name, SCAN_TOML)
    toml = write(tmp_path / "p.toml", 'out = "res"\nsteps = ["report", "compare"]\n'
                                      '[[compare]]\nscan = "s1.toml"\n[[compare]]\nscan = "s2.toml"\ntypes = ["all"]\n'
                                      "[kinetics]\n")
    pipe = load_pipeline(toml)
    assert [s.name for s in pipe.steps] == ["report", "compare", "compare"]
    assert pipe.steps[1].arguments == {"scan": str(tmp_path / "s1.toml")}
    assert pipe.steps[2].arguments["types"] == ["all"]
    assert main(["run", toml, "--dry-run"]) == 0
    captured = capsys.readouterr()
    assert captured.out.splitlines()[0] == "dihedra.presentation.report.write_report(result)"
    assert captured.out.splitlines()[1].startswith("dihedra.compare_with_scan(result, scan=")
    assert "table [kinetics] is not listed in steps" in captured.err
    # without steps, the tables run in the documented order whatever the file order
    toml = write(tmp_path / "q.toml", 'out = "res"\n[report]\n[figures]\n[profile]\n')
    assert [s.name for s in load_pipeline(toml).steps] == ["profile", "figures", "report"]
    # the types chosen for the figures are the report's too, unless [report] chooses its own
    toml = write(tmp_path / "r.toml", 'out = "res"\n[figures]\ntypes = ["A:phi"]\n[report]\n')
    notes = []
    report = load_pipeline(toml, log=notes.append).steps[-1]
    assert report.name == "report" and report.arguments["types"] == ["A:phi"]
    assert any("[report] shows the types of [figures]" in n for n in notes)
    toml = write(tmp_path / "s.toml", 'out = "res"\n[figures]\ntypes = ["A:phi"]\n[report]\ntypes = ["B:psi"]\n')
    assert load_pipeline(toml).steps[-1].arguments["types"] == ["B:psi"]


def test_run_executes_the_steps_and_copies_the_file_into_the_results_folder(tmp_path, monkeypatch, capsys):
    data = tmp_path / "data"
    os.makedirs(data)
    top, trajs = make_system(str(data), n_frames=120, n_molecules=3)
    write(tmp_path / "scan.toml", SCAN_TOML)
    text = (f'# my analysis\nout = "results"\n\n[track]\ntopology = "data/{os.path.basename(top)}"\n'
            f'trajectories = {json.dumps(["data/" + os.path.basename(t) for t in trajs])}\n'
            'torsions = ["rotatable"]\ntemperature_k = 300.0\nkeep_angles = true\n\n'
            '[profile]\nn_bootstrap = 30\nper_torsion = false\n\n[compare]\nscan = "scan.toml"\nn_bootstrap = 30\n\n'
            '[kinetics]\nn_bootstrap = 20\nlags = [1, 2]\n\n[figures]\nformats = "png"\n\n[report]\n')
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
    assert pipe.steps[0].arguments["topology"] == top
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
                 'temperature_k = 300\n[kinetics]\nlags_ps = [0.37]\n')
    assert main(["run", toml]) == 2   # a lag that only the tracked frames' spacing can refuse
    err = capsys.readouterr().err
    assert "step kinetics (f.toml, [kinetics]) failed" in err and "0.37" in err
    record = json.loads((tmp_path / "res" / RECORD_NAME).read_text())
    assert [(s["step"], s["status"]) for s in record["steps"]] == [("track", "done"), ("kinetics", "failed")]


@pytest.mark.parametrize("table, fragment", [
    ('[compare]\nscan = "bad-scan.csv"\n', "1 distinct angle"),           # a scan the reader refuses
    ('[compare]\nscan = "one-column.csv"\n', "has 1 column"),
    ('[profile]\nbin_width_deg = 7\n', "bin_width_deg"),
    ('[profile]\nn_bootstrap = 0\n', "at least 20 resamples"),
    ('[profile]\ntemperature_k = -4\n', "positive number of kelvin"),
    ('[kinetics]\nlags = [1, 0]\n', "each lag"),
    ('[kinetics]\nlags_ps = [2.0, 0]\n', "lags_ps"), ('[kinetics]\nlags_ps = nan\n', "lags_ps"),
    ('[kinetics]\nn_bootstrap = -1\n', "n_bootstrap"),
    ('[refit]\ntarget = "bad-scan.csv"\nn_bootstrap = 0\n', "n_bootstrap"),
    ('[compare]\nscan = "good-scan.csv"\nscan_angle_unit = "grad"\n', "angle unit"),
    ('[couplings]\nrelation = "nothere"\n', "nothere"),
    ('[figures]\nformats = ["gif"]\n', "figure format"),
    ('[windows]\nwindows = "bad-scan.csv"\ntemperature_k = 300\n', "window table"),
    # steps that need the angle series, without track's keep_angles
    ('[ramachandran]\n', "keep_angles = true"), ('[kinetics]\ncore_margin_deg = 10\n', "keep_angles = true"),
    ('[profile]\npairs = [["HEX:C1-C2-C3-C4", "HEX:C1-C2-C3-C4"]]\n', "keep_angles = true"),
    ('[refit]\ntarget = "good-scan.csv"\n', "keep_angles = true"),
    # names the run will not have ('all' is every type, in every step)
    ('[figures]\ntypes = ["NOPE"]\n', "or 'all'"),
    ('[report]\nout = "good-scan.csv"\n', "not a report"),
])
def test_every_table_is_checked_before_the_first_step(tmp_path, capsys, table, fragment):
    data = tmp_path / "data"
    os.makedirs(data)
    top, trajs = make_system(str(data), n_replicas=1, n_frames=10, n_molecules=2)
    write(tmp_path / "bad-scan.csv", "angle_deg,energy_kj_mol\n0,0\n")
    write(tmp_path / "one-column.csv", "angle_deg\n0\n120\n")
    write(tmp_path / "good-scan.csv", "angle,energy_kj_mol\n0,0\n120,1\n240,2\n")
    toml = write(tmp_path / "f.toml", f'out = "res"\n[track]\ntopology = "{top}"\ntrajectories = ["{trajs[0]}"]\n'
                 + table)
    assert main(["run", toml]) == 2
    err = capsys.readouterr().err
    assert err.count("dihedra: error:") == 1 and fragment in err and "Traceback" not in err
    assert "step 1/" not in err and not os.path.exists(tmp_path / "res")   # nothing ran


# ------------------------------------------------------------------------------------------------
# the demo
# ------------------------------------------------------------------------------------------------
def test_the_demo_file_is_a_valid_analysis_of_the_bundled_example():
    path = example_path("demo.toml")
    pipe = load_pipeline(path, out="/nonexistent/demo-out")
    names = [s.name for s in pipe.steps]
    assert names == ["track", "profile", "compare", "kinetics", "figures", "report"]
    track = pipe.steps[0].arguments
    assert track["topology"] == example_path("hexane.pdb") and track["keep_angles"] is True
    assert pipe.steps[2].arguments["scan"] == example_path("trappe_ua_torsion.toml")


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
    # a step with notices says so in its line (they are in its .json file and the report)
    kinetics = json.loads((out / "kinetics.json").read_text())["notices"]
    line = next(x for x in (captured.out + captured.err).splitlines() if x.startswith("   kinetics:"))
    assert kinetics and line.endswith(f"; {len(kinetics)} notice(s), in its .json file and the report")
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
    monkeypatch.setattr(demo, "run_pipeline", lambda pipe, log=None: seen.setdefault("pipe", pipe))
    assert main(["demo", "--out", str(out), "--workers", "2"]) == 0
    pipe = seen["pipe"]
    assert pipe.overwrite and pipe.steps[0].arguments["workers"] == 2 and pipe.out == str(out)


def test_the_full_example_of_the_docs_is_a_valid_analysis_file(tmp_path):
    docs = os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))), "docs", "pipelines.md")
    text = open(docs).read()
    block = re.search(r"## A full example\s+```toml\n(.*?)```", text, flags=re.S).group(1)
    os.makedirs(tmp_path / "inputs")
    for name in ("inputs/hexane.pdb", "inputs/run1.xtc", "inputs/run2.xtc"):
        write(tmp_path / name, "")
    write(tmp_path / "measured_couplings.csv", "residue,J_hz,J_err_hz\nALA2,7.1,0.4\n")
    write(tmp_path / "trappe_ua_torsion.toml", SCAN_TOML)
    pipe = load_pipeline(write(tmp_path / "analysis.toml", block))
    assert [s.name for s in pipe.steps] == ["track", "profile", "compare", "kinetics", "couplings", "figures",
                                           "report"]
    track = pipe.steps[0].arguments
    assert [track["topology"]] + track["trajectories"] == [str(tmp_path / "inputs" / x)
                                                            for x in ("hexane.pdb", "run1.xtc", "run2.xtc")]


def butane_compare_file(tmp_path, types):
    """An analysis file tracking the bundled butane and comparing ``types`` with the TraPPE scan."""
    toml = tmp_path / "a.toml"
    toml.write_text('out = "res"\nsteps = ["track", "compare"]\n'
                    f'[track]\ntopology = "{example_path("butane_rb.pdb")}"\n'
                    f'trajectories = ["{example_path("butane_rb.xtc")}"]\ntemperature_k = 298.15\n'
                    f'[compare]\nscan = "{example_path("trappe_ua_torsion.toml")}"\ntypes = {json.dumps(types)}\n')
    return str(toml)


def test_a_type_the_run_will_not_have_stops_the_file_before_track(tmp_path):
    # the torsions of the run are known from its topology: a misspelt type in [compare] is an
    # error of the file, found before any step runs (nothing is written)
    with pytest.raises(DihedraError, match=r"\[compare\]: torsion type 'BUT:C1-C2-C3-C5' is not among the torsions"):
        load_pipeline(butane_compare_file(tmp_path, ["BUT:C1-C2-C3-C5"]))
    assert not os.path.exists(tmp_path / "res")
    assert [st.name for st in load_pipeline(butane_compare_file(tmp_path, ["BUT:C1-C2-C3-C4"])).steps] == [
        "track", "compare"]


def test_ramachandran_is_a_step_whose_tables_equal_the_api(tmp_path):
    # MDAnalysisTests' adenylate kinase (GRO/XTC, 10 frames): the step writes what
    # ramachandran_regions(result).save writes
    from MDAnalysisTests.datafiles import GRO, XTC

    text = (f'steps = ["track", "ramachandran"]\n[track]\ntopology = "{GRO}"\ntrajectories = ["{XTC}"]\n'
            'torsions = ["protein-backbone"]\nkeep_angles = true\n')
    pipe = load_pipeline(str(write(tmp_path / "a.toml", text)), out=str(tmp_path / "res"))
    run_pipeline(pipe)
    res = dihedra.load_results(str(tmp_path / "res"))
    direct = dihedra.ramachandran_regions(res)
    pd.testing.assert_frame_equal(pd.read_csv(tmp_path / "res" / "ramachandran_by_type.csv"),
                                  pd.read_csv(direct.save(str(tmp_path / "direct"))[1]))


def test_an_interrupted_step_is_recorded_as_such(tmp_path, monkeypatch):
    # Ctrl-C (or SIGTERM) during a step after the results folder exists: analysis.json says which
    # step was interrupted, and the earlier ones are done
    import dataclasses

    from dihedra.pipeline import runner

    data = tmp_path / "data"
    os.makedirs(data)
    top, trajs = make_system(str(data), n_replicas=1, n_frames=20, n_molecules=2)
    toml = write(tmp_path / "f.toml", f'out = "res"\nsteps = ["track", "profile"]\n[track]\ntopology = "{top}"\n'
                 f'trajectories = ["{trajs[0]}"]\ntemperature_k = 300\n')

    def interrupted(ctx, arguments):
        raise KeyboardInterrupt

    monkeypatch.setitem(runner.STEPS, "profile", dataclasses.replace(runner.STEPS["profile"], run=interrupted))
    with pytest.raises(KeyboardInterrupt):
        run_pipeline(load_pipeline(str(toml)))
    record = json.loads((tmp_path / "res" / RECORD_NAME).read_text())
    assert [(s["step"], s["status"]) for s in record["steps"]] == [("track", "done"), ("profile", "interrupted")]


def test_types_given_as_patterns_become_the_runs_types_before_track(tmp_path):
    # fnmatch patterns (Python's standard library), as --types takes them on the command line
    compare = load_pipeline(butane_compare_file(tmp_path, ["BUT:*"])).steps[1]
    assert compare.arguments["types"] == ["BUT:C1-C2-C3-C4"]
    with pytest.raises(DihedraError, match=r"\[compare\]: types HEX:\*: no torsion type matches"):
        load_pipeline(butane_compare_file(tmp_path, ["HEX:*"]))
