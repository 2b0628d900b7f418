"""Comparison of sampled profiles with static scans: metrics, verdicts, files, command line."""

import json
import os

import numpy as np
import pandas as pd
import pytest
from scipy import integrate
from scipy.spatial.distance import jensenshannon

from dihedra.analysis.compare import (Thresholds, align_offset, compare_with_scan, js_divergence_bits,
                                      predicted_state_populations)
from dihedra.errors import DihedraError
from dihedra.analysis.profiles import type_profiles
from dihedra.analysis.scans import read_scan_csv, scan_from_points
from dihedra.selection.schemes import get_scheme
from dihedra.units import R_KJ_PER_MOL_K

from synthetic_rotors import EXAMPLE_TEMPERATURE_K, butane_results, rb_energy

T = EXAMPLE_TEMPERATURE_K
KT = R_KJ_PER_MOL_K * T
GRID = np.arange(-180.0, 180.0, 10.0)


@pytest.fixture(scope="module")
def butane(tmp_path_factory):
    return butane_results(tmp_path_factory.mktemp("butane-compare"))


def scan_csv(path, header, energies_kj_mol, factor=1.0):
    path.write_text(header + "\n" + "".join(f"{a:g},{float(e) / factor!r}\n" for a, e in zip(GRID, energies_kj_mol)))
    return str(path)


def test_butane_profile_matches_rb_potential(butane):
    # Ryckaert & Bellemans, Faraday Discuss. Chem. Soc. 66 (1978) 95: a united-atom butane with the RB
    # torsion and no 1-4 nonbonded terms samples exp(-V/kT); RMSE between profile and V under 0.5 kJ/mol
    # where V < 15
    res, source = butane
    hist, _ = type_profiles(res, T, kernel=False)[res.torsion_set.types[0]]
    v = rb_energy(hist.angle_deg)
    sel = (v < 15.0) & hist.sampled
    w = 1 / np.maximum(hist.free_energy_err_kj_mol[sel], 0.02 * KT) ** 2
    offset = np.sum(w * (hist.free_energy_kj_mol[sel] - v[sel])) / np.sum(w)
    rmse = np.sqrt(np.mean((hist.free_energy_kj_mol[sel] - v[sel] - offset) ** 2))
    assert sel.sum() > 40, source
    assert rmse < 0.5, (source, rmse)


def test_butane_verdicts(butane, tmp_path):
    # against the exact RB scan (Ryckaert & Bellemans 1978; given in kcal/mol, 4.184 kJ per thermochemical
    # kcal, common practice) the verdict is "consistent"; against a scan whose gauche region is raised by
    # 2.5 kJ/mol, "inconsistent"
    res, source = butane
    exact = read_scan_csv(scan_csv(tmp_path / "exact.csv", "angle_deg,energy_kcal_mol", rb_energy(GRID), 4.184))
    good = compare_with_scan(res, exact, temperature_k=T)
    assert good.table["verdict"].tolist() == ["consistent"], (source, good.table["verdict_reason"].tolist())
    assert good.table["rmse_kj_mol"].iloc[0] < 0.5
    raised_e = rb_energy(GRID) + np.where(np.abs(GRID) < 120, 2.5, 0.0)
    raised = read_scan_csv(scan_csv(tmp_path / "raised.csv", "angle_deg,energy_kj_mol", raised_e))
    bad = compare_with_scan(res, raised, temperature_k=T)
    assert bad.table["verdict"].tolist() == ["inconsistent"], (source, bad.table["verdict_reason"].tolist())
    # the gauche populations are far above the raised scan's prediction
    assert (bad.table[["z_score_gauche+", "z_score_gauche-"]] > 3).all(axis=None)


def test_undersampled_when_a_scan_minimum_is_never_visited(butane):
    # the rule of dihedra.analysis.compare: undersampled when the reliable region misses a minimum of the scan (here a deep
    # cis minimum that the RB simulation never visits)
    res, _ = butane
    e = rb_energy(GRID) - 60.0 * np.exp(-(GRID / 20.0) ** 2)
    cmp = compare_with_scan(res, scan_from_points(GRID, e), temperature_k=T)
    assert cmp.table["verdict"].iloc[0] == "undersampled"
    assert "misses the scan minimum" in cmp.table["verdict_reason"].iloc[0]


def test_predicted_populations_by_integration():
    # analytic: p_scan ~ exp(-E/kT) integrated over the anti-gauche arcs (scipy quad)
    scan = scan_from_points(GRID, rb_energy(GRID))
    pops = predicted_state_populations(scan, get_scheme("anti-gauche"), KT)

    def w(a, b):
        return integrate.quad(lambda x: np.exp(-scan.energy_at(x) / KT), a, b, limit=200)[0]
    z = w(-180, 180)
    assert abs(pops[0] - (w(120, 180) + w(-180, -120)) / z) < 1e-4
    assert abs(pops[1] - w(0, 120) / z) < 1e-4
    assert abs(pops.sum() - 1) < 1e-12


def test_js_divergence_matches_scipy():
    # reference library: scipy's jensenshannon is the square root of the divergence
    rng = np.random.default_rng(1)
    p, q = rng.random(72), rng.random(72)
    p[:5] = 0
    assert abs(js_divergence_bits(p, q) - jensenshannon(p, q, base=2) ** 2) < 1e-12
    assert js_divergence_bits(p, p) == 0


def test_offset_alignment_recovers_a_shift():
    # analytic: F = E + c exactly gives back c, whatever the weights
    e = rb_energy(np.arange(-177.5, 180, 5.0))
    err = np.linspace(0.05, 0.4, len(e))
    mask = e < 15
    assert abs(align_offset(e + 3.7, e, err, mask, KT) - 3.7) < 1e-12


def test_files_and_text(butane, tmp_path):
    # common practice: tidy tables with units, JSON with thresholds, text that explains
    res, _ = butane
    scan = read_scan_csv(scan_csv(tmp_path / "s.csv", "angle_deg,energy_kj_mol", rb_energy(GRID)), kind="relaxed")
    cmp = compare_with_scan(res, scan, temperature_k=T, thresholds=Thresholds(tolerance_kj_mol=0.8))
    paths = cmp.save(str(tmp_path))
    table = pd.read_csv(paths[0])
    assert {"rmse_kj_mol", "max_abs_difference_kj_mol", "js_divergence_bits", "verdict"} <= set(table.columns)
    details = json.load(open(paths[2]))
    assert details["thresholds"]["tolerance_kj_mol"] == 0.8 and details["scan"]["kind"] == "relaxed"
    # the rules carry the values they were applied with (the report shows them as written here)
    assert details["rules"]["inconsistent"] == "excess RMSE > 0.8 kJ/mol, or a state ddG > 0.8 kJ/mol and > 3 errors"
    assert "error <= 0.2 kT, F <= 6 kT" in details["rules"]["reliable_bin"]
    prof = pd.read_csv(paths[1])
    assert prof.loc[~prof["sampled"], "free_energy_kj_mol"].isna().all()


def test_compare_command(butane, tmp_path, capsys):
    # common practice: thin command line; units mandatory (of the scan that is read: --scan-*); one type
    # needs no --types; an analysis replaces its own earlier files only with --overwrite
    from dihedra.cli import main
    res, _ = butane
    plain = scan_csv(tmp_path / "plain.csv", "phi,E", rb_energy(GRID), 4.184)
    assert main(["compare", res.folder, "--scan", plain]) == 2
    assert "unit is unknown" in capsys.readouterr().err
    assert main(["compare", res.folder, "--scan", plain, "--scan-angle-unit", "deg", "--scan-energy-unit",
                 "kcal/mol"]) == 0
    out = capsys.readouterr().out
    assert "CONSISTENT" in out and "one-dimensional" in out and "environment" in out
    assert os.path.exists(os.path.join(res.folder, "comparison.json"))
    assert main(["compare", res.folder, "--scan", plain, "--scan-angle-unit", "deg", "--scan-energy-unit",
                 "kcal/mol"]) == 2
    assert "comparison" in capsys.readouterr().err
    assert main(["compare", res.folder, "--scan", plain, "--scan-angle-unit", "deg", "--scan-energy-unit",
                 "kcal/mol", "--types", "XYZ:nothing", "--overwrite"]) == 2
    assert "XYZ:nothing" in capsys.readouterr().err
    # the former names still work, with a note naming the new ones
    assert main(["compare", res.folder, "--scan", plain, "--angle-unit", "deg", "--energy-unit", "kcal/mol",
                 "--overwrite"]) == 0
    err = capsys.readouterr().err
    assert "--angle-unit is now --scan-angle-unit" in err and "--energy-unit is now --scan-energy-unit" in err


def test_types_must_be_named_when_several():
    # common practice: a scan describes one torsion type; with several, the user names it
    class Fake:
        class torsion_set:
            types = ["A:x", "B:y"]
    with pytest.raises(DihedraError, match="--types"):
        from dihedra.analysis.compare import select_types
        select_types(Fake, None)


def test_in_memory_and_saved_results_give_identical_tables(tmp_path):
    # the calling convention: an analysis reads only the result object, so a result kept in memory
    # and the same result written and loaded back give the same tables
    from dihedra.analysis.couplings import ensemble_couplings, read_experimental
    from dihedra.io.resultsdir import load_results, write_results
    from dihedra.tracking import track
    from synthetic_rotors import inverse_cdf_samples, write_rotor_trajectory

    angles = inverse_cdf_samples(rb_energy, T, (400, 40), np.random.default_rng(21))
    pdb, dcd = write_rotor_trajectory(str(tmp_path), "mem", angles)
    memory = track(pdb, [dcd], torsions="rotatable", scheme="anti-gauche", temperature_k=T)
    assert memory.folder is None
    folder = tmp_path / "saved"
    folder.mkdir()
    write_results(memory, str(folder))
    import dihedra   # (the tables only: the run's convergence checks go with them, as track writes them)

    dihedra.convergence(memory).save(str(folder))
    loaded = load_results(str(folder))
    scan = scan_from_points(GRID, rb_energy(GRID))
    label = memory.torsion_set.labels[3]
    pd.DataFrame({"torsion": [label], "J_hz": [5.0], "J_err_hz": [0.3]}).to_csv(tmp_path / "exp.csv", index=False)
    experimental = read_experimental(str(tmp_path / "exp.csv"))
    both = []
    for res in (memory, loaded):
        cmp = compare_with_scan(res, scan, temperature_k=T, n_bootstrap=50)
        cres = ensemble_couplings(res, "karplus-1959", types=[res.torsion_set.types[0]], experimental=experimental)
        both.append((cmp, cres))
    (cm, cr), (lm, lr) = both
    # couplings come from the block histograms alone: exactly equal
    pd.testing.assert_frame_equal(cr.couplings, lr.couplings, check_exact=True)
    pd.testing.assert_frame_equal(cr.experiment, lr.experiment, check_exact=True)
    assert cr.experiment_summary == lr.experiment_summary
    pd.testing.assert_frame_equal(cm.profiles, lm.profiles, check_exact=True)
    pd.testing.assert_frame_equal(cm.table, lm.table, check_exact=True)
    assert json.dumps(cm.details, default=str) == json.dumps(lm.details, default=str)
    # and the files written are the same
    for name, (a, b) in {"mem": (cm, cr), "loaded": (lm, lr)}.items():
        (tmp_path / name).mkdir()
        a.save(str(tmp_path / name))
        b.save(str(tmp_path / name))
    for table in ("comparison.csv", "comparison_profiles.csv", "comparison.json", "couplings_karplus-1959.csv",
                  "couplings_karplus-1959_vs_experiment.csv", "couplings_karplus-1959.json"):
        assert (tmp_path / "mem" / table).read_bytes() == (tmp_path / "loaded" / table).read_bytes(), table
    # a TorsionStates analysis that has run stands for its tracking result: the same tables
    import MDAnalysis as mda
    from dihedra import TorsionStates
    ran = TorsionStates(mda.Universe(pdb, dcd), "rotatable", temperature_k=T, keep_states=False).run()
    pd.testing.assert_frame_equal(ensemble_couplings(ran, "karplus-1959", types=[memory.torsion_set.types[0]],
                                                     experimental=experimental).couplings,
                                  cr.couplings, check_exact=True)
    ran_table = compare_with_scan(ran, scan, temperature_k=T, n_bootstrap=50).table
    # (without its state series, keep_states=False, the run's convergence was never checked)
    assert list(ran_table["sampling"]) == ["not checked"]
    pd.testing.assert_frame_equal(ran_table.drop(columns="sampling"), cm.table.drop(columns="sampling"),
                                  check_exact=True)
    with pytest.raises(DihedraError, match="expected a tracking result"):
        compare_with_scan(str(folder), scan, temperature_k=T)
    # a scan may be given as a file (units in the column names)
    path = scan_csv(tmp_path / "scan.csv", "angle_deg,energy_kj_mol", rb_energy(GRID))
    from_file = compare_with_scan(memory, path, temperature_k=T, n_bootstrap=50)
    pd.testing.assert_frame_equal(from_file.table, cm.table, check_exact=True)


def test_a_verdict_on_unconverged_sampling_says_so(butane, tmp_path, capsys):
    # five frames of the butane example: the convergence checks of the run call it not converged
    # (fewer than 20 effective samples), and a comparison of its profile must not read as settled
    from dihedra.cli import main
    from dihedra.tracking import track
    from synthetic_rotors import EXAMPLE_BUTANE

    if not os.path.exists(EXAMPLE_BUTANE + ".xtc"):
        pytest.skip("the bundled butane example is not in this checkout")
    out = str(tmp_path / "short")
    res = track(EXAMPLE_BUTANE + ".pdb", [EXAMPLE_BUTANE + ".xtc"], torsions="rotatable", out=out, stop=5,
                temperature_k=T)
    scan = scan_csv(tmp_path / "rb.csv", "phi_deg,E_kj_mol", rb_energy(GRID))
    cmp = compare_with_scan(res, scan)
    row = cmp.table.iloc[0]
    assert row["sampling"].startswith("not converged") and "effective samples" in row["sampling"]
    assert any("not converged" in n and "may still change" in n for n in cmp.notices)
    assert main(["compare", out, "--scan", scan, "--temperature", str(T + 50), "--overwrite"]) == 0
    said = capsys.readouterr()
    assert "but the sampling is not converged" in said.out
    # the notices are shown and kept: the unconverged sampling, a temperature that is not the run's
    assert "note: 1 compared type(s) are not converged" in said.err and "was simulated at" in said.err
    kept = json.load(open(os.path.join(out, "comparison.json")))["notices"]
    assert any("not converged" in n for n in kept) and any("was simulated at" in n for n in kept)
    # the whole run: the column holds the run's own verdict, whatever it is
    full = compare_with_scan(butane[0], scan)
    verdicts = pd.read_csv(os.path.join(butane[0].folder, "convergence.csv")).set_index("type")["verdict"]
    assert full.table.iloc[0]["sampling"] == verdicts[full.table.iloc[0]["type"]]


def test_a_consistent_verdict_names_differences_its_errors_resolve():
    # a ddG inside the practical tolerance but many errors from 0 is consistent, and said to be
    # measurably apart; one inside its error is not mentioned (rules of the module notes)
    from dihedra.analysis.compare import _verdict

    metrics = {"n_reliable_bins": 60, "excess_rmse_kj_mol": 0.2}
    states = [{"state": "anti", "ddg_kj_mol": 0.0, "free_energy_err_kj_mol": 0.0},
              {"state": "gauche+", "ddg_kj_mol": 0.5, "free_energy_err_kj_mol": 0.1},
              {"state": "gauche-", "ddg_kj_mol": 0.4, "free_energy_err_kj_mol": 0.5}]
    verdict, reason = _verdict(metrics, [], states, "anti", Thresholds())
    assert verdict == "consistent"
    assert "measurably apart" in reason and "gauche+ vs anti" in reason and "gauche- vs anti" not in reason
    verdict, reason = _verdict(metrics, [], states[:1] + states[2:], "anti", Thresholds())
    assert verdict == "consistent" and "measurably apart" not in reason
