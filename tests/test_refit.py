"""Torsion corrections fitted by reweighting: known answers from a simulated butane gas, the exports,
the honest limits, the command, the analysis-file step and the figure.

The known answers come from a united-atom butane gas simulated with OpenMM for the purpose
(example_trajectories/make_refit_butane.py): the Ryckaert-Bellemans torsion (Ryckaert & Bellemans,
Faraday Discuss. Chem. Soc. 66 (1978) 95; coefficients as commonly quoted, from memory) plus a known
extra term dV_true = 2 kJ/mol [1 + cos(phi)]. The molecules do not interact and a torsion angle needs
no Jacobian, so every torsion samples exactly p ~ exp(-(V_RB + dV_true)/kT); a fit against the exact
Boltzmann profile or populations of V_RB alone (numerical integration with scipy) must give back
-dV_true up to a constant: k_1 = 2 kJ/mol at phase 180 deg.
"""

import json
import os
import sys
import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import integrate

from dihedra import fit_torsion_correction
from dihedra.analysis.refit import kish, openmm_xml, read_target, ryckaert_bellemans
from dihedra.analysis.refit.fit import ReweightingModel, features
from dihedra.analysis.refit.observables import population_set, profile_set
from dihedra.analysis.refit.samples import TorsionSamples
from dihedra.analysis.refit.targets import profile_on_bins
from dihedra.cli import main
from dihedra.cli.common import format_pm
from dihedra.errors import DihedraError
from dihedra.selection.schemes import get_scheme
from dihedra.tracking import track
from dihedra.units import kt_kj_mol

HERE = os.path.dirname(os.path.abspath(__file__))
EXAMPLES = os.path.join(HERE, "..", "example_trajectories")
T = 400.0
KT = kt_kj_mol(T)
#: Ryckaert & Bellemans (1978), C0..C5 in kJ/mol, psi = phi - 180 deg (from memory).
RB = (9.28, 12.16, -13.12, -3.06, 26.24, -31.5)
#: The extra term of the simulation: (periodicity, k in kJ/mol, phase in deg).
EXTRA = (1, 2.0, 0.0)
TYPE = "BUT:C1-C2-C3-C4"


def rb_energy(phi_deg):
    cos_psi = np.cos(np.radians(np.asarray(phi_deg, dtype=float) - 180.0))
    return sum(c * cos_psi ** n for n, c in enumerate(RB))


def periodic(phi_deg, terms):
    phi = np.radians(np.asarray(phi_deg, dtype=float))
    return sum(k * (1 + np.cos(n * phi - np.radians(d))) for n, k, d in terms)


def boltzmann_populations(energy):
    """anti (|phi| > 120), gauche+ (0, 120], gauche- [-120, 0) of p ~ exp(-V/kT) (scipy quad)."""
    def w(x):
        return np.exp(-energy(x) / KT)
    part = {arc: integrate.quad(w, *arc, limit=200)[0] for arc in ((-180, -120), (-120, 0), (0, 120), (120, 180))}
    total = sum(part.values())
    return {"anti": (part[(-180, -120)] + part[(120, 180)]) / total, "gauche+": part[(0, 120)] / total,
            "gauche-": part[(-120, 0)] / total}


def load_script():
    sys.path.insert(0, EXAMPLES)
    try:
        import make_refit_butane
    finally:
        sys.path.remove(EXAMPLES)
    return make_refit_butane


@pytest.fixture(scope="session")
def gas(tmp_path_factory):
    """150 butanes, 100 frames 2 ps apart at 400 K with RB + dV_true (about 10 s), tracked with angles."""
    pytest.importorskip("openmm")
    script = load_script()
    folder = tmp_path_factory.mktemp("refit-gas")
    prefix = str(folder / "butane")
    script.check_periodic_sign((EXTRA,))
    script.simulate_butane_with_terms(prefix, n_molecules=150, n_frames=100, frame_interval_ps=2.0, temperature_k=T,
                                      extra_terms=(EXTRA,))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return track(prefix + ".pdb", [prefix + ".xtc"], torsions="rotatable", keep_angles=True, temperature_k=T,
                     out=str(folder / "results"))


@pytest.fixture(scope="session")
def targets(tmp_path_factory):
    """The exact Boltzmann profile (F = V_RB on a 0.5-degree grid) and populations of V_RB at 400 K."""
    folder = tmp_path_factory.mktemp("refit-targets")
    grid = np.arange(-180.0, 180.01, 0.5)
    profile = folder / "rb_profile.csv"
    pd.DataFrame({"angle_deg": grid, "free_energy_kj_mol": rb_energy(grid)}).to_csv(profile, index=False)
    exact = boltzmann_populations(rb_energy)
    pops = folder / "rb_populations.csv"
    pd.DataFrame({"type": TYPE, "state": list(exact), "population": list(exact.values()),
                  "population_err": 0.0}).to_csv(pops, index=False)
    return {"profile": str(profile), "populations": str(pops), "exact": exact}


@pytest.fixture(scope="session")
def profile_fit(gas, targets):
    return fit_torsion_correction(gas, targets["profile"], n_bootstrap=50)


# ------------------------------------------------------------------------------------------------
# Known answers (the "done when")
# ------------------------------------------------------------------------------------------------

def test_populations_fit_reweights_onto_the_exact_boltzmann_populations(gas, targets):
    fit = fit_torsion_correction(gas, targets["populations"], n_bootstrap=30)
    pops = fit.populations.set_index("state")
    for state, exact in targets["exact"].items():
        # the sampled ensemble is far off (the extra term penalises gauche by 3 kJ/mol)...
        assert abs(pops.loc[state, "sampled_population"] - exact) > 0.03
        # ...the reweighted one matches the Boltzmann integral of V_RB within 0.01
        assert abs(pops.loc[state, "reweighted_population"] - exact) < 0.01
    s = fit.summary.iloc[0]
    # Kish's effective sample fraction, recomputed here from its definition on the fitted weights
    assert 0.5 < s["effective_sample_fraction"] <= 1.0 and s["trustworthy"]
    assert s["effective_sample_fraction_err"] > 0
    assert any("populations alone under-determine" in n for n in fit.notices)
    assert s["effective_parameters"] < s["n_coefficients"] - 1


def test_profile_fit_recovers_the_extra_term(profile_fit):
    terms = profile_fit.terms.set_index("n")
    k1, err = terms.loc[1, "k_kj_mol"], terms.loc[1, "k_err_kj_mol"]
    # -dV_true = -2 (1 + cos phi) = 2 (1 + cos(phi - 180)) - 4: k_1 = 2 kJ/mol, phase 180 deg
    assert abs(k1 - EXTRA[1]) <= 2 * err and err < 0.3
    dphase = (terms.loc[1, "phase_deg"] - 180.0 + 180.0) % 360.0 - 180.0
    assert abs(dphase) <= 3 * terms.loc[1, "phase_err_deg"] + 1.0
    # the curve is -dV_true up to a constant where the run sampled (|phi| >= 60 deg)
    curve = profile_fit.correction
    x = curve["angle_deg"].to_numpy()
    use = np.abs(x) >= 60
    truth = -periodic(x, [EXTRA])
    diff = curve["delta_v_kj_mol"].to_numpy()[use] - truth[use]
    diff -= diff.mean()
    assert np.all(np.abs(diff) <= 3 * curve["delta_v_err_kj_mol"].to_numpy()[use] + 0.1)
    s = profile_fit.summary.iloc[0]
    assert s["chi_square_reweighted"] < 2.0 < s["chi_square_sampled"]


def test_reweighted_populations_are_the_boltzmann_populations_of_the_corrected_potential(profile_fit):
    terms = profile_fit.terms
    fitted = [(int(r.n), r.k_kj_mol, r.phase_deg) for r in terms.itertuples()]
    analytic = boltzmann_populations(lambda x: rb_energy(x) + periodic(x, [EXTRA]) + periodic(x, fitted))
    pops = profile_fit.populations.set_index("state")
    for state, value in analytic.items():
        assert abs(pops.loc[state, "reweighted_population"] - value) < 0.01


def test_the_target_beyond_the_sampled_range_is_reported(profile_fit):
    # the syn barrier of V_RB (45 kJ/mol, 13 kT at 400 K) is never crossed
    note = [n for n in profile_fit.notices if "did not sample enough" in n]
    assert note and "+0 " not in note[0] and "deg" in note[0]
    rows = profile_fit.profiles
    near_syn = rows[np.abs(rows["angle_deg"]) < 20]
    assert not near_syn["fitted"].any() and np.isfinite(near_syn["target_free_energy_kj_mol"]).all()


def test_a_run_reweighted_onto_its_own_profile_needs_no_correction(gas, tmp_path):
    # the target is another results folder (its profiles.csv): here the run's own profile, so the
    # correction must vanish within its errors (every cosine and sine coefficient within 3 errors of 0)
    from dihedra import free_energy_profiles

    folder = tmp_path / "own"
    free_energy_profiles(gas, temperature_k=T, per_torsion=False, n_bootstrap=20).save(str(folder))
    fit = fit_torsion_correction(gas, str(folder), n_bootstrap=20)
    terms = fit.terms
    for part in ("cos", "sin"):
        assert np.all(np.abs(terms[f"{part}_kj_mol"]) <= 3 * terms[f"{part}_err_kj_mol"])
    assert fit.summary.iloc[0]["effective_sample_fraction"] > 0.95
    # the target folder's own state populations fill the target column (not fitted: a check), and
    # they are the Boltzmann populations of the run's potential V_RB + dV_true (scipy quad) within
    # their errors
    states = pd.read_csv(folder / "state_free_energies.csv").set_index("state")
    pops = fit.populations.set_index("state")
    exact = boltzmann_populations(lambda x: rb_energy(x) + periodic(x, [EXTRA]))
    for state in ("anti", "gauche+", "gauche-"):
        row = pops.loc[state]
        assert row["target_population"] == pytest.approx(states.loc[state, "population"], abs=1e-12)
        assert row["target_population_err"] == pytest.approx(states.loc[state, "population_err"], abs=1e-12)
        assert not row["fitted"]
        assert abs(row["target_population"] - exact[state]) <= 3 * row["target_population_err"]
    assert [n for n in fit.notices if "not fitted, a check" in n and "state_free_energies.csv" in n]


def test_target_populations_of_another_scheme_are_not_shown(gas, tmp_path):
    # the folder's states must be the run's: a target folder with the states of another scheme
    # (anti-gauche sectors moved by 30 degrees) says why its populations are left out
    from dihedra import free_energy_profiles

    folder = tmp_path / "other"
    free_energy_profiles(gas, temperature_k=T, per_torsion=False, n_bootstrap=20).save(str(folder))
    scheme = dict(gas.summary["scheme"], name="shifted",
                  boundaries_deg=[b + 30.0 for b in gas.summary["scheme"]["boundaries_deg"]])
    (folder / "summary.json").write_text(json.dumps({"scheme": scheme}))
    fit = fit_torsion_correction(gas, str(folder), n_bootstrap=3, regularisation=0.1)
    assert fit.populations["target_population"].isna().all()
    assert [n for n in fit.notices if "another scheme (shifted)" in n]


# ------------------------------------------------------------------------------------------------
# Errors of the terms: the run's sampling and the target's own uncertainty
# ------------------------------------------------------------------------------------------------

def populations_target(err):
    """The exact Boltzmann populations of V_RB at 400 K, each with the stated error ``err``."""
    exact = boltzmann_populations(rb_energy)
    return pd.DataFrame({"type": TYPE, "state": list(exact), "population": list(exact.values()),
                         "population_err": err})


def test_a_less_certain_target_gives_larger_errors_of_the_terms(gas):
    # the same run, a target 50 times less certain: the target's error dominates the run's (its
    # populations are sampled to about 0.004) and must show in the terms and the reweighted values
    sure, loose = (fit_torsion_correction(gas, populations_target(err), n_bootstrap=30) for err in (0.001, 0.05))
    for n in (1, 2):   # the terms the populations determine (anti against gauche)
        assert loose.terms.loc[n - 1, "k_err_kj_mol"] >= 5 * sure.terms.loc[n - 1, "k_err_kj_mol"]
    # the errors of the run alone (0.41 when gauche+ against gauche- still pulled on the cosine fit)
    assert sure.terms.loc[0, "k_err_kj_mol"] < 0.1
    loose_err, sure_err = (f.populations.set_index("state")["reweighted_population_err"] for f in (loose, sure))
    assert loose_err["anti"] >= 5 * sure_err["anti"]
    # a cosine series moves gauche+ and gauche- alike: the run's own split between them (sampled to
    # about 0.004) stays in their errors however certain the target, so they grow less
    for state in ("gauche+", "gauche-"):
        assert loose_err[state] >= 3 * sure_err[state]
        assert sure_err[state] <= 2 * sure.populations.set_index("state").loc[state, "sampled_population_err"]


def test_a_noisy_target_of_the_runs_own_potential_gives_terms_consistent_with_zero(gas):
    # the target is the exact Boltzmann profile of the run's own potential V_RB + dV_true on its
    # 10-degree bins (scipy quad), with the noise of its stated error (1 kJ/mol per bin, like a
    # profile from umbrella windows): no correction is needed, so every fitted coefficient must be
    # within 3 of its errors of zero (with the errors of the run alone, the largest is 5 errors from
    # zero here, 4 to 11 over ten draws of the noise)
    def own(x):
        return rb_energy(x) + periodic(x, [EXTRA])

    edges = np.arange(-180.0, 180.01, 10.0)
    exact = [-KT * np.log(integrate.quad(lambda x: np.exp(-own(x) / KT), a, b)[0] / 10.0)
             for a, b in zip(edges[:-1], edges[1:])]
    noise = np.random.default_rng(0).standard_normal(len(exact))
    target = pd.DataFrame({"angle_deg": edges[:-1] + 5.0, "free_energy_kj_mol": np.add(exact, noise),
                           "free_energy_err_kj_mol": 1.0})
    fit = fit_torsion_correction(gas, target, n_bootstrap=30)
    for part in ("cos", "sin"):   # k_n >= 0 is no normal variable at zero; its components are
        assert np.all(np.abs(fit.terms[f"{part}_kj_mol"]) <= 3 * fit.terms[f"{part}_err_kj_mol"])
    assert any("drawn independently" in n for n in fit.notices)


def test_an_almost_exact_target_gives_the_errors_of_the_run_alone(gas, monkeypatch):
    from dihedra.analysis.refit.fit import ObservableSet

    both = fit_torsion_correction(gas, populations_target(1e-4), n_bootstrap=30).terms
    # the run-only bootstrap: the same resamples of the run, the target held at its values
    monkeypatch.setattr(ObservableSet, "drawn_target", lambda self, rng: self.target)
    run_only = fit_torsion_correction(gas, populations_target(1e-4), n_bootstrap=30).terms
    for col in ("k_err_kj_mol", "cos_err_kj_mol", "sin_err_kj_mol"):
        assert both[col].to_numpy() == pytest.approx(run_only[col].to_numpy(), rel=0.05)


def test_a_draw_of_the_target_moves_every_value_by_its_error():
    # the parametric bootstrap (Efron & Tibshirani, An Introduction to the Bootstrap, 1993, from
    # memory): value + error x N(0, 1); a profile's points are drawn, then binned
    samples = synthetic_samples()
    pops = population_set(samples, get_scheme("anti-gauche"))
    pops.target[:] = [0.99, 0.5, np.nan]
    pops.target_err[:] = [0.05, 0.02, np.nan]
    rng = np.random.default_rng(1)
    draws = np.array([pops.drawn_target(rng) for _ in range(2000)])
    assert draws[:, 0].max() == 1.0 and np.isnan(draws[:, 2]).all()   # populations stay within [0, 1]
    assert np.std(draws[:, 1]) == pytest.approx(0.02, rel=0.1) and np.mean(draws[:, 1]) == pytest.approx(0.5, abs=0.002)
    centres = np.arange(-165.0, 180.0, 30.0)
    table = pd.DataFrame({"angle_deg": centres, "free_energy_kj_mol": np.cos(np.radians(centres)),
                          "free_energy_err_kj_mol": 0.3})
    prof = profile_set(samples, 30.0, KT, read_target(table))
    draws = np.array([prof.drawn_target(rng) for _ in range(2000)])
    assert np.std(draws, axis=0) == pytest.approx(np.full(12, 0.3), rel=0.1)
    exact = profile_set(samples, 30.0, KT, read_target(table.assign(free_energy_err_kj_mol=0.0)))
    assert np.array_equal(exact.drawn_target(rng), exact.target)


# ------------------------------------------------------------------------------------------------
# Cosine terms by default; which combinations the target determines
# ------------------------------------------------------------------------------------------------

def anti_only_target(err=0.01):
    """The exact Boltzmann anti population of V_RB at 400 K (scipy quad) alone: it says nothing about
    how the rest splits between gauche+ and gauche-."""
    exact = boltzmann_populations(rb_energy)
    return pd.DataFrame({"type": [TYPE], "state": ["anti"], "population": [exact["anti"]], "population_err": [err]})


@pytest.fixture(scope="module")
def anti_fits(gas):
    return {sym: fit_torsion_correction(gas, anti_only_target(), symmetric=sym, n_bootstrap=30)
            for sym in (True, False)}


def test_the_default_correction_is_a_cosine_series_that_keeps_gauche_plus_and_minus_equal(anti_fits):
    # butane is achiral: V(phi) = V(-phi) for V_RB and the extra term alike, so gauche+ and gauche-
    # are equally likely (scipy quad: 0.17396 each at 298 K); the default fit is a cosine series
    # (phases 0 or 180 deg, common practice for the torsion terms of AMBER, CHARMM and OPLS) and the
    # reweighted gauche+ and gauche- stay equal within their errors, each (1 - anti) / 2
    fit = anti_fits[True]
    assert fit.parameters["symmetric"] is True
    assert (fit.terms["sin_kj_mol"] == 0).all() and set(fit.terms["phase_deg"].round(9) % 180.0) == {0.0}
    pops = fit.populations.set_index("state")
    plus, minus = pops.loc["gauche+"], pops.loc["gauche-"]
    spread = np.hypot(plus["reweighted_population_err"], minus["reweighted_population_err"])
    assert abs(plus["reweighted_population"] - minus["reweighted_population"]) <= 2 * spread
    half = (1 - boltzmann_populations(rb_energy)["anti"]) / 2
    for row in (plus, minus):
        assert abs(row["reweighted_population"] - half) <= 3 * row["reweighted_population_err"] + 0.003
    # the anti population was reached (its target error 0.01)
    assert abs(pops.loc["anti", "reweighted_population"] - pops.loc["anti", "target_population"]) < 0.01
    assert not [n for n in fit.notices if "differs between phi and -phi" in n]


def test_what_the_target_sets_and_what_the_regularisation_alone_sets_is_said(anti_fits, gas):
    # an anti population sets one combination: the correction's difference between the anti and the
    # gauche wells, dV(180) - dV(+-60) = -1.5 a1 + 1.5 a2 + 0 a3 (cos 60 = 1/2, cos 120 = -1/2,
    # cos 180 = -1: trigonometric identities), so about (-a1 + a2) / sqrt(2); a3 (cos 3 phi = -1 in
    # all three wells) and, with sine terms, every b_n (the split between phi and -phi) are left
    # to the regularisation
    from dihedra.analysis.refit.notices import determined_notice

    cos_only, with_sines = anti_fits[True], anti_fits[False]
    note = [n for n in cos_only.notices if "the data determine about" in n]
    assert len(note) == 1 and "the target sets" in note[0] and f"a3 of {TYPE}" in note[0]
    assert "set mainly by the regularisation" in note[0] and "moves anti of" in note[0]
    note = [n for n in with_sines.notices if "the data determine about" in n]
    assert len(note) == 1 and f"b1, b2, a3, b3 of {TYPE}" in note[0] and "gauche+ against gauche-" in note[0]
    # the combination itself, from the model's singular vectors
    from dihedra.analysis.refit.observables import population_set
    from dihedra.analysis.refit.samples import molecule_ids, read_samples

    positions = list(range(len(gas.torsion_set.labels)))
    samples = read_samples(gas, positions, molecule_ids(gas, positions, "molecule", None, []), "molecule")
    pops = population_set(samples, gas.scheme, read_target(anti_only_target()))
    model = ReweightingModel(features(samples, 3, True), samples.sample_weights(), [pops], KT)
    sigmas = [np.where(pops.fitted, 0.01, 1.0)]
    share, vt, _ = model.directions(np.zeros(3), 1.0, sigmas)
    assert share[0] > 0.5 and share[1:].max() < 0.1
    assert abs(vt[0] @ np.array([-1.0, 1.0, 0.0]) / np.sqrt(2)) > 0.9
    assert sum(share) == pytest.approx(model.effective_parameters(np.zeros(3), 1.0, sigmas))
    # the console says the determined count points at the notes, and rates only the frames
    summary = cos_only.summary.iloc[0]
    text = determined_notice(model, {"theta": np.zeros(3), "lam": 1.0, "sigmas": sigmas}, [TYPE], 3, True,
                             "populations", {"effective_parameters": float(sum(share))})
    assert "a3 of " + TYPE in text and summary["effective_parameters"] < 2.0


def test_the_mirror_test_of_a_sampled_profile_is_calibrated_and_finds_an_asymmetric_one():
    # i.i.d. angles: uniform (mirror-symmetric) or from p ~ 1 + 0.5 sin(phi) (not); the chi-square
    # over the mirror pairs of bins follows the chi-square distribution (scipy) for the symmetric one
    from dihedra.analysis.profiles import bootstrap_multiplicities
    from dihedra.analysis.refit.fit import sampled_errors
    from dihedra.analysis.refit.notices import mirror_asymmetry

    def stat(angles):
        samples = synthetic_samples()
        samples.angles = angles.astype(np.float32)
        prof = profile_set(samples, 30.0, KT)
        model = ReweightingModel(features(samples, 1), samples.sample_weights(), [prof], KT)
        cell, replica = samples.cells(10)
        boot = bootstrap_multiplicities(replica, 200, np.random.default_rng(0))
        (name, chi_square, pairs, p), = mirror_asymmetry(model, sampled_errors(model, (b[cell] for b in boot)), 50)
        return chi_square / pairs, p

    rng = np.random.default_rng(5)
    flat = [stat(rng.uniform(-180, 180, size=(40, 200))) for _ in range(6)]
    assert 0.6 < np.mean([r for r, _ in flat]) < 1.5 and min(p for _, p in flat) > 1e-3
    x = rng.uniform(-180, 180, size=40 * 200 * 3)
    keep = rng.uniform(0, 1.5, size=x.size) < 1 + 0.5 * np.sin(np.radians(x))
    _, p = stat(x[keep][:40 * 200].reshape(40, 200))
    assert p < 1e-6


def test_cli_fits_cosines_unless_sine_terms_are_asked_for(gas, tmp_path, capsys):
    import shutil

    folder = str(tmp_path / "results")
    shutil.copytree(gas.folder, folder, ignore=shutil.ignore_patterns("refit*"))
    target = tmp_path / "anti.csv"
    anti_only_target().to_csv(target, index=False)
    common = ["refit", folder, "--target", str(target), "--temperature", "400", "--bootstrap", "5",
              "--regularisation", "0.1", "--overwrite"]
    assert main(common) == 0
    out = capsys.readouterr().out
    assert (pd.read_csv(os.path.join(folder, "refit_fourier.csv"))["sin_kj_mol"] == 0).all()
    # the line on the reweighting rates the frames (Kish), not the correction
    assert "reweighting: enough effective samples (Kish effective sample fraction" in out
    assert "this rates the frames, not the correction's terms" in out and "trustworthy" not in out
    assert "coefficients determined by the data; the regularisation sets the rest" in out
    assert main(common + ["--sine-terms"]) == 0
    capsys.readouterr()
    assert (pd.read_csv(os.path.join(folder, "refit_fourier.csv"))["sin_kj_mol"] != 0).any()
    assert json.load(open(os.path.join(folder, "refit.json")))["parameters"]["symmetric"] is False
    assert main(common + ["--sine-terms", "--symmetric"]) == 2
    assert "not allowed with argument" in capsys.readouterr().err


# ------------------------------------------------------------------------------------------------
# Honest limits
# ------------------------------------------------------------------------------------------------

def test_without_the_topology_residues_are_the_molecules(gas, targets):
    import copy

    moved = copy.copy(gas)
    moved.summary = {**gas.summary, "topology": {"path": "/nonexistent/butane.pdb"}}
    fit = fit_torsion_correction(moved, targets["populations"], n_bootstrap=5)
    assert any("each residue was taken as one molecule" in n for n in fit.notices)
    assert fit.summary.iloc[0]["n_samples"] == 150 * 100   # one residue per butane here



def test_weights_per_frame_collapse_and_the_fit_says_a_new_simulation_is_needed(gas, targets):
    # one weight for 150 molecules at once: the Boltzmann factor of 150 corrections
    fit = fit_torsion_correction(gas, targets["populations"], weights_per="frame", n_bootstrap=10)
    s = fit.summary.iloc[0]
    assert s["effective_sample_fraction"] < 0.1 and not s["trustworthy"] and not fit.trustworthy
    assert fit.notices[0].startswith("NOT TRUSTWORTHY") and "a new simulation with this correction is needed" in \
        fit.notices[0]
    assert "NOT TRUSTWORTHY" in fit.openmm_xml


def test_a_target_far_from_the_sample_is_not_trustworthy(gas, tmp_path):
    # a target whose minima are the sampled barriers (V_RB + 15 (1 - cos 3 phi)): the weight goes to
    # the few frames that crossed them
    grid = np.arange(-180.0, 180.01, 1.0)
    far = tmp_path / "far.csv"
    pd.DataFrame({"angle_deg": grid, "free_energy_kj_mol": rb_energy(grid) + periodic(grid, [(3, 15.0, 180.0)])}
                 ).to_csv(far, index=False)
    fit = fit_torsion_correction(gas, str(far), n_bootstrap=10)
    s = fit.summary.iloc[0]
    assert s["effective_sample_fraction"] < 0.1 and not fit.trustworthy
    assert s["effective_sample_fraction"] == pytest.approx(s["n_effective_reweighted"] / s["n_effective_sampled"])
    assert fit.notices[0].startswith("NOT TRUSTWORTHY")


def test_the_angle_series_is_required(targets):
    res = track(os.path.join(EXAMPLES, "butane_rb.pdb"), [os.path.join(EXAMPLES, "butane_rb.xtc")],
                torsions="rotatable", stop=50, temperature_k=298.15)
    with pytest.raises(DihedraError, match="keep_angles"):
        fit_torsion_correction(res, targets["populations"])


# ------------------------------------------------------------------------------------------------
# Coupled torsions: liquid n-hexane (the bundled example), three torsion types per molecule
# ------------------------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def hexane():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return track(os.path.join(EXAMPLES, "hexane.pdb"), [os.path.join(EXAMPLES, "hexane.xtc")],
                     torsions="rotatable", keep_angles=True, temperature_k=298.15, stop=300)


def test_coupled_types_are_fitted_together_with_one_weight_per_molecule(hexane, tmp_path):
    types = list(dict.fromkeys(hexane.torsion_set.types))
    assert len(types) == 3
    goal = {t: ([0.62, 0.19, 0.19] if "C2-C3-C4-C5" in t else [0.66, 0.17, 0.17]) for t in types}
    path = tmp_path / "hexane_target.csv"
    pd.DataFrame([{"type": t, "state": s, "population": p, "population_err": 0.005}
                  for t in types for s, p in zip(["anti", "gauche+", "gauche-"], goal[t])]).to_csv(path, index=False)
    fit = fit_torsion_correction(hexane, str(path), n_bootstrap=5)
    pops = fit.populations
    assert np.abs(pops["reweighted_population"] - pops["target_population"]).max() < 0.01
    # the same numbers by hand: one weight per molecule, exp(-(sum of the corrections of its three
    # torsions)/kT) (independent of the package's sparse sums)
    angles = hexane.angles()
    terms = {t: [(int(r.n), r.k_kj_mol, r.phase_deg) for r in fit.terms[fit.terms["type"] == t].itertuples()]
             for t in types}
    labels = hexane.torsion_set.labels
    kt = kt_kj_mol(298.15)
    energy = np.zeros((len(angles), 100))
    for k, (label, ttype) in enumerate(zip(labels, hexane.torsion_set.types)):
        energy[:, k // 3] += periodic(angles[label].to_numpy(float), terms[ttype])
    w = np.exp(-(energy - energy.min()) / kt)
    for t in types:
        anti = sum((np.abs(angles[lab].to_numpy()) > 120) * w[:, k // 3]
                   for k, lab in enumerate(labels) if hexane.torsion_set.types[k] == t)
        expected = anti.sum() / (3 * 0 + w.sum())
        row = pops[(pops["type"] == t) & (pops["state"] == "anti")].iloc[0]
        assert row["reweighted_population"] == pytest.approx(expected, abs=1e-9)


def test_a_corrected_type_without_a_target_is_named(hexane, tmp_path):
    types = list(dict.fromkeys(hexane.torsion_set.types))
    inner = next(t for t in types if "C2-C3-C4-C5" in t)
    path = tmp_path / "inner.csv"
    pd.DataFrame({"type": inner, "state": ["anti", "gauche+", "gauche-"], "population": [0.6, 0.2, 0.2],
                  "population_err": 0.01}).to_csv(path, index=False)
    fit = fit_torsion_correction(hexane, str(path), types=types, n_bootstrap=5)
    notes = [n for n in fit.notices if "has no target" in n]
    assert len(notes) == 2 and all("give it a target" in n for n in notes)
    only = fit_torsion_correction(hexane, str(path), n_bootstrap=5)
    assert only.parameters["types"] == [inner] and not any("has no target" in n for n in only.notices)


# ------------------------------------------------------------------------------------------------
# Exports
# ------------------------------------------------------------------------------------------------

def test_ryckaert_bellemans_form_equals_the_fourier_series():
    # identity cos(n phi) = T_n(cos phi) with cos(phi) = -cos(psi), psi = phi - 180 (common practice)
    rng = np.random.default_rng(3)
    a = rng.normal(size=5)
    c = ryckaert_bellemans(a, constant=0.7)
    phi = np.linspace(-180, 180, 721)
    fourier = 0.7 + sum(an * np.cos((n + 1) * np.radians(phi)) for n, an in enumerate(a))
    cos_psi = np.cos(np.radians(phi - 180.0))
    rb = sum(cm * cos_psi ** m for m, cm in enumerate(c))
    assert np.allclose(rb, fourier, atol=1e-12)
    with pytest.raises(DihedraError, match="at most 5"):
        ryckaert_bellemans(np.ones(6))


def test_symmetric_fit_has_a_ryckaert_bellemans_form_equal_to_its_terms(gas, targets):
    fit = fit_torsion_correction(gas, targets["profile"], symmetric=True, n_bootstrap=10)
    assert set(fit.terms["phase_deg"].round(6) % 180.0) == {0.0}
    c = fit.ryckaert_bellemans.sort_values("power")["coefficient_kj_mol"].to_numpy()
    phi = np.linspace(-180, 180, 361)
    terms = [(int(r.n), r.k_kj_mol, r.phase_deg) for r in fit.terms.itertuples()]
    rb = sum(cm * np.cos(np.radians(phi - 180.0)) ** m for m, cm in enumerate(c))
    assert np.allclose(rb, periodic(phi, terms), atol=1e-9)


BASE_FORCEFIELD = """<ForceField>
 <AtomTypes>
  <Type name="CH3" class="CH3" element="C" mass="15.035"/>
  <Type name="CH2" class="CH2" element="C" mass="14.027"/>
 </AtomTypes>
 <Residues>
  <Residue name="BUT">
   <Atom name="C1" type="CH3"/><Atom name="C2" type="CH2"/><Atom name="C3" type="CH2"/><Atom name="C4" type="CH3"/>
   <Bond atomName1="C1" atomName2="C2"/><Bond atomName1="C2" atomName2="C3"/><Bond atomName1="C3" atomName2="C4"/>
  </Residue>
 </Residues>
 <RBTorsionForce>
  <Proper class1="CH3" class2="CH2" class3="CH2" class4="CH3" c0="9.28" c1="12.16" c2="-13.12" c3="-3.06"
          c4="26.24" c5="-31.5"/>
 </RBTorsionForce>
</ForceField>
"""


def correction_system(fragment_path, tmp_path, n_molecules=1):
    """An OpenMM system made by ForceField from a united-atom butane file plus the fragment."""
    from openmm.app import ForceField

    script = load_script()
    base = tmp_path / "butane_ua.xml"
    base.write_text(BASE_FORCEFIELD)
    topology = script.me.build_topology(n_molecules, 4, "BUT", 3.0)
    return ForceField(str(base), fragment_path).createSystem(topology)


def test_the_openmm_fragment_loads_and_adds_the_correction(profile_fit, tmp_path):
    openmm = pytest.importorskip("openmm")
    fragment = tmp_path / "refit_openmm.xml"
    xml = openmm_xml(
        profile_fit.terms, {TYPE: ("BUT", ["C1", "C2", "C3", "C4"])},
        atom_classes={"C1": "CH3", "C2": "CH2", "C3": "CH2", "C4": "CH3"})
    fragment.write_text(xml)
    openmm.app.ForceField(str(fragment))   # loads on its own
    system = correction_system(str(fragment), tmp_path)
    forces = {type(f).__name__: f for f in system.getForces()}
    assert {"RBTorsionForce", "PeriodicTorsionForce"} <= set(forces)
    forces["PeriodicTorsionForce"].setForceGroup(1)
    script = load_script()
    terms = [(int(r.n), r.k_kj_mol, r.phase_deg) for r in profile_fit.terms.itertuples()]
    for phi in (180.0, 60.0, -60.0, 0.0, 120.0, -100.0):
        ctx = openmm.Context(system, openmm.VerletIntegrator(0.001), openmm.Platform.getPlatformByName("Reference"))
        ctx.setPositions(script.me.chain_coordinates(4, 0.154, 114.0, [phi]))
        energy = ctx.getState(getEnergy=True, groups={1}).getPotentialEnergy()._value
        assert energy == pytest.approx(float(periodic(phi, terms)), abs=1e-6)
        del ctx


HEXANE_CLASSES = {"C1": "CH3", "C2": "CH2", "C3": "CH2", "C4": "CH2", "C5": "CH2", "C6": "CH3"}


def hexane_forcefield(tmp_path):
    """A united-atom n-hexane force field file for OpenMM: atom classes only (no torsion terms)."""
    atoms = "".join(f'<Atom name="{name}" type="{cls}"/>' for name, cls in HEXANE_CLASSES.items())
    bonds = "".join(f'<Bond atomName1="C{i}" atomName2="C{i + 1}"/>' for i in range(1, 6))
    path = tmp_path / "hexane_ua.xml"
    path.write_text(BASE_FORCEFIELD.split("<Residues>")[0] + f'<Residues><Residue name="HEX">{atoms}{bonds}'
                    "</Residue></Residues></ForceField>")
    return str(path)


def test_types_that_are_one_force_field_term_are_fitted_as_one_and_openmm_applies_the_fit(hexane, tmp_path):
    # hexane's end torsions C1-C2-C3-C4 and C3-C4-C5-C6 are CH3-CH2-CH2-CH2 forwards and reversed: OpenMM
    # matches both with the first <Proper> of that pattern (openmm.app.ForceField), so one correction
    # can reach them. The fit ties them, and OpenMM's own energy of the fragment (a system built by
    # ForceField from it) equals the sum of the fitted terms over the three torsions.
    openmm = pytest.importorskip("openmm")
    types = ["HEX:C1-C2-C3-C4", "HEX:C2-C3-C4-C5", "HEX:C3-C4-C5-C6"]
    goal = {t: ([0.62, 0.19, 0.19] if t == types[1] else [0.66, 0.17, 0.17]) for t in types}
    path = tmp_path / "hexane_target.csv"
    pd.DataFrame([{"type": t, "state": s, "population": p, "population_err": 0.005}
                  for t in types for s, p in zip(["anti", "gauche+", "gauche-"], goal[t])]).to_csv(path, index=False)
    # with sine terms (symmetric=False): the phases of OpenMM's terms are checked, not only 0 and 180
    fit = fit_torsion_correction(hexane, str(path), types=types, atom_classes=HEXANE_CLASSES, n_bootstrap=5,
                                 symmetric=False)
    assert fit.parameters["tied_types"] == [[types[0], types[2]]]
    assert any(n.startswith(f"{types[0]} and {types[2]} are one force-field term") for n in fit.notices)
    cols = ["n", "cos_kj_mol", "sin_kj_mol"]
    ends = [fit.terms[fit.terms["type"] == t][cols].to_numpy() for t in (types[0], types[2])]
    assert np.array_equal(*ends)
    assert fit.openmm_xml.count("<Proper ") == 2
    fragment = tmp_path / "refit_openmm.xml"
    fragment.write_text(fit.openmm_xml)
    script = load_script()
    from openmm.app import ForceField

    system = ForceField(hexane_forcefield(tmp_path), str(fragment)).createSystem(script.me.build_topology(1, 6, "HEX",
                                                                                                          3.0))
    terms = {t: [(int(r.n), r.k_kj_mol, r.phase_deg) for r in fit.terms[fit.terms["type"] == t].itertuples()]
             for t in types}
    ctx = openmm.Context(system, openmm.VerletIntegrator(0.001), openmm.Platform.getPlatformByName("Reference"))
    for phis in ([180.0, 180.0, 180.0], [60.0, 180.0, -60.0], [-70.0, 65.0, 150.0], [120.0, -100.0, 30.0]):
        ctx.setPositions(script.me.chain_coordinates(6, 0.154, 114.0, phis))
        energy = ctx.getState(getEnergy=True).getPotentialEnergy()._value
        assert energy == pytest.approx(sum(float(periodic(phi, terms[t])) for phi, t in zip(phis, types)), abs=1e-6)
    if fit.ryckaert_bellemans is not None:   # its sine terms dropped: the output says which file has which
        note = next(n for n in fit.notices if "refit_ryckaert_bellemans.csv" in n)
        assert "refit_openmm.xml" in note and "sine terms included" in fit.openmm_xml


def test_an_openmm_fragment_that_would_drop_a_correction_is_refused():
    # two types with different terms on one pattern of atom classes (reversed): OpenMM would apply one
    terms = pd.DataFrame({"type": ["A", "B"], "n": 1, "k_kj_mol": [1.0, 2.0], "phase_deg": 0.0,
                          "cos_kj_mol": [1.0, 2.0], "sin_kj_mol": 0.0})
    atoms = {"A": ("HEX", ["C1", "C2", "C3", "C4"]), "B": ("HEX", ["C3", "C4", "C5", "C6"])}
    with pytest.raises(DihedraError, match="types A and B map onto the same atom classes.*fit them as one term"):
        openmm_xml(terms, atoms, atom_classes=HEXANE_CLASSES)
    same = terms.assign(k_kj_mol=1.0, cos_kj_mol=1.0)   # the same terms (a tied fit): one entry for both
    assert openmm_xml(same, atoms, atom_classes=HEXANE_CLASSES).count("<Proper ") == 1
    assert openmm_xml(terms, atoms).count("<Proper ") == 2   # atom names stand in: nothing coincides


def test_the_terms_belong_to_their_types_in_any_order_of_types(hexane, tmp_path):
    types = ["HEX:C1-C2-C3-C4", "HEX:C2-C3-C4-C5", "HEX:C3-C4-C5-C6"]
    path = tmp_path / "inner.csv"
    pd.DataFrame({"type": types[1], "state": ["anti", "gauche+", "gauche-"], "population": [0.6, 0.2, 0.2],
                  "population_err": 0.01}).to_csv(path, index=False)
    fits = [fit_torsion_correction(hexane, str(path), types=order, regularisation=0.01, n_bootstrap=2)
            for order in (types, [types[1], types[0], types[2]])]
    one, other = (f.terms.set_index(["type", "n"]).sort_index()["k_kj_mol"] for f in fits)
    assert np.allclose(one, other, rtol=1e-6)


def test_saved_files_have_units_in_their_columns(profile_fit, tmp_path):
    paths = profile_fit.save(str(tmp_path))
    names = {os.path.basename(p) for p in paths}
    assert {"refit_terms.csv", "refit_fourier.csv", "refit_correction.csv", "refit_populations.csv",
            "refit_profiles.csv", "refit_summary.csv", "refit_cross_validation.csv", "refit_openmm.xml",
            "refit.json"} <= names
    terms = pd.read_csv(tmp_path / "refit_terms.csv")
    assert list(terms.columns) == ["type", "n", "k_kj_mol", "k_err_kj_mol", "phase_deg", "phase_err_deg"]
    assert list(pd.read_csv(tmp_path / "refit_correction.csv").columns) == [
        "type", "angle_deg", "delta_v_kj_mol", "delta_v_err_kj_mol"]
    info = json.loads((tmp_path / "refit.json").read_text())
    assert any("Cesari" in r for r in info["references"]) and any("Kish" in r for r in info["references"])
    cv = pd.read_csv(tmp_path / "refit_cross_validation.csv")
    assert cv["chosen"].sum() == 1


# ------------------------------------------------------------------------------------------------
# The pieces, against definitions
# ------------------------------------------------------------------------------------------------

def synthetic_samples(n_mol=40, n_frames=200, seed=0):
    rng = np.random.default_rng(seed)
    angles = rng.uniform(-180, 180, size=(n_mol, n_frames)).astype(np.float32)
    return TorsionSamples(labels=[f"M{i}:A" for i in range(n_mol)], types=["T"] * n_mol, type_names=["T"],
                          type_index=np.zeros(n_mol, int), molecule=np.arange(n_mol), angles=angles,
                          replica=np.zeros(n_frames, int), position=np.arange(n_frames),
                          frame_weight=np.ones(n_frames), weights_per="molecule")


def test_analytic_jacobian_equals_finite_differences():
    # central differences (common practice) of the residuals of a population and a profile target
    samples = synthetic_samples()
    pops = population_set(samples, get_scheme("anti-gauche"))
    pops.target[:] = [0.5, 0.3, 0.2]
    pops.target_err[:] = 0.01
    pops.fitted[:] = True
    prof = profile_set(samples, 30.0, KT)
    prof.target[:] = np.cos(np.radians(prof.rows["angle_deg"].to_numpy()))
    prof.target_err[:] = 0.1
    prof.fitted[:] = True
    sig = [np.full(len(pops), 0.02), np.full(len(prof), 0.2)]
    for symmetric in (False, True):   # cosine-only: mirror pairs (gauche+/-, bins at +-phi) fitted by their sums
        model = ReweightingModel(features(samples, 2, symmetric), samples.sample_weights(), [pops, prof], KT,
                                 mirrored=symmetric)
        theta = np.array([0.3, -0.2, 0.5, 0.1])[:model.n_params]
        _, jac = model._residuals(theta, None, sig, 0.1, True)
        h = 1e-6
        num = np.column_stack([(model._residuals(theta + h * e, None, sig, 0.1, False)[0]
                                - model._residuals(theta - h * e, None, sig, 0.1, False)[0]) / (2 * h)
                               for e in np.eye(model.n_params)])
        assert np.allclose(jac, num, atol=1e-6)
    # the pairs: gauche+ with gauche-, anti its own image; the bin at +15 deg with the one at -15
    assert pops.mirror.tolist() == [0, 2, 1]
    centres = prof.rows["angle_deg"].to_numpy()
    assert np.allclose(centres[prof.mirror], -centres)


def test_kish_effective_sample_size():
    # Kish, Survey Sampling (1965): (sum w)^2 / sum w^2; n equal weights give n
    assert kish(np.ones(10)) == pytest.approx(10.0)
    assert kish([1.0, 0.0, 0.0]) == pytest.approx(1.0)
    assert kish([3.0, 1.0]) == pytest.approx(16.0 / 10.0)


def test_observables_reproduce_plain_counts():
    samples = synthetic_samples()
    pops = population_set(samples, get_scheme("anti-gauche"))
    model = ReweightingModel(features(samples, 1), samples.sample_weights(), [pops], KT)
    (values, _), = model.values(model.weights(np.zeros(2)))
    a = samples.angles.ravel()
    assert values[0] == pytest.approx(np.mean(np.abs(a) > 120))
    assert values[1] == pytest.approx(np.mean((a > 0) & (a <= 120)))


def test_profile_target_on_bins_is_the_boltzmann_bin_average():
    # bin average of exp(-V/kT) by scipy quad against the trapezoid average of a 0.1-degree grid
    grid = np.arange(-180.0, 180.001, 0.1)
    table = pd.DataFrame({"angle_deg": grid, "free_energy_kj_mol": rb_energy(grid), "free_energy_err_kj_mol": 0.0})
    edges = np.linspace(-180, 180, 37)
    f, _ = profile_on_bins(table, edges, KT)
    exact = [-KT * np.log(integrate.quad(lambda x: np.exp(-rb_energy(x) / KT), a, b)[0] / (b - a))
             for a, b in zip(edges[:-1], edges[1:])]
    assert np.allclose(f, exact, atol=2e-3)


def test_target_kinds_are_told_from_their_columns(tmp_path):
    (tmp_path / "p.csv").write_text("angle_deg,free_energy_kcal_mol\n-60,1\n180,0\n")
    target = read_target(str(tmp_path / "p.csv"))
    assert target.kind == "profile" and target.table["free_energy_kj_mol"].tolist() == [4.184, 0.0]
    (tmp_path / "s.csv").write_text("type,state,population\nX,anti,0.7\n")
    assert read_target(str(tmp_path / "s.csv")).kind == "populations"
    (tmp_path / "j.csv").write_text("torsion,J_hz,J_err_hz\nALA2:phi,7.1,0.3\n")
    assert read_target(str(tmp_path / "j.csv")).kind == "couplings"
    (tmp_path / "x.csv").write_text("a,b\n1,2\n")
    with pytest.raises(DihedraError, match="cannot tell what kind of target"):
        read_target(str(tmp_path / "x.csv"))


# ------------------------------------------------------------------------------------------------
# Couplings as a target
# ------------------------------------------------------------------------------------------------

def test_couplings_target_through_a_karplus_relation(gas, tmp_path):
    from dihedra.analysis.couplings import get_relation

    rel = get_relation("karplus-1959")
    # the relation averaged over the exact Boltzmann distribution of V_RB (scipy quad): the target
    num = integrate.quad(lambda x: rel.evaluate(x) * np.exp(-rb_energy(x) / KT), -180, 180, limit=200)[0]
    den = integrate.quad(lambda x: np.exp(-rb_energy(x) / KT), -180, 180, limit=200)[0]
    path = tmp_path / "j.csv"
    pd.DataFrame({"torsion": [TYPE], "J_hz": [num / den], "J_err_hz": [0.05]}).to_csv(path, index=False)
    with pytest.raises(DihedraError, match="Karplus relation"):
        fit_torsion_correction(gas, str(path), n_bootstrap=5)
    fit = fit_torsion_correction(gas, str(path), relation="karplus-1959", n_bootstrap=10)
    row = fit.couplings.iloc[0]
    assert abs(row["sampled_j_hz"] - num / den) > 0.1          # the extra term moves <J>
    assert abs(row["reweighted_j_hz"] - num / den) < 0.05       # reweighted onto the target
    assert any("no systematic spread" in n for n in fit.notices)
    assert not any("not read by the refit" in n for n in fit.notices)
    # a column the refit does not read (the coupled_atoms of 'dihedra couplings') is named, not dropped
    pd.DataFrame({"torsion": [TYPE], "coupled_atoms": ["HN,HA"], "J_hz": [num / den], "J_err_hz": [0.05]}).to_csv(
        path, index=False)
    fit = fit_torsion_correction(gas, str(path), relation="karplus-1959", n_bootstrap=5)
    assert [n for n in fit.notices if "column(s) coupled_atoms not read by the refit" in n]


# ------------------------------------------------------------------------------------------------
# Command line, analysis file, figure
# ------------------------------------------------------------------------------------------------

def test_cli_refit_writes_the_files_and_prints_a_summary(gas, targets, capsys):
    status = main(["refit", gas.folder, "--target", targets["profile"], "--temperature", "400", "--bootstrap", "10",
                   "--atom-classes", "C1=CH3,C2=CH2,C3=CH2,C4=CH3"])
    out = capsys.readouterr()
    assert status == 0
    assert "Kish effective sample fraction" in out.out and "phase =" not in out.out
    # a cosine series (the default) prints its signed coefficients, as refit_fourier.csv holds them
    fourier = pd.read_csv(os.path.join(gas.folder, "refit_fourier.csv")).iloc[0]
    assert f"n = 1   a = {format_pm(fourier['cos_kj_mol'], fourier['cos_err_kj_mol']):>17} kJ/mol" in out.out
    assert os.path.exists(os.path.join(gas.folder, "refit_openmm.xml"))
    assert 'class1="CH3"' in open(os.path.join(gas.folder, "refit_openmm.xml")).read()


def test_report_shows_the_refit_rounded_to_its_errors_and_says_when_it_cannot_be_trusted(gas, targets, tmp_path):
    import shutil

    from dihedra.presentation.report import build_report
    from dihedra.presentation.rounding import format_value_error

    folder = str(tmp_path / "results")
    shutil.copytree(gas.folder, folder)
    assert main(["refit", folder, "--target", targets["profile"], "--temperature", "400", "--bootstrap", "10",
                 "--overwrite"]) == 0
    text = build_report(folder, figures=False)
    section = text[text.index("<section id='refit'>"):]
    section = section[:section.index("</section>")]
    summary = pd.read_csv(os.path.join(folder, "refit_summary.csv"))
    assert bool(summary["trustworthy"][0])   # 150 gas-phase butanes: Kish's fraction about 0.8
    # the verdict says what it rates: enough effective samples (Kish), not the correction's terms
    lead = section.split("</p>")[0]
    assert "verdict v-consistent'>enough effective samples<" in lead and "trustworthy" not in lead
    assert "This rates the frames, not the correction's terms" in section
    terms = pd.read_csv(os.path.join(folder, "refit_terms.csv"))
    for row in terms.itertuples():   # every term, each value rounded to its bootstrap error
        assert format_value_error(row.k_kj_mol, row.k_err_kj_mol) in section
        assert format_value_error(row.phase_deg, row.phase_err_deg) in section
    pops = pd.read_csv(os.path.join(folder, "refit_populations.csv"))
    for row in pops.itertuples():
        assert format_value_error(row.reweighted_population, row.reweighted_population_err) in section
    assert "refit_openmm.xml" in section and "a new simulation with it is the real test" in section
    # a fit whose effective sample fraction fell below the minimum says so in the verdict
    summary["trustworthy"] = False
    summary.to_csv(os.path.join(folder, "refit_summary.csv"), index=False)
    text = build_report(folder, figures=False)
    assert "verdict v-inconsistent'>too few effective samples<" in text and "rest on a few frames" in text


def test_cli_refit_errors_are_one_line(gas, tmp_path, capsys):
    bad = tmp_path / "bad.csv"
    bad.write_text("a,b\n1,2\n")
    assert main(["refit", gas.folder, "--target", str(bad)]) == 2
    assert main(["refit", gas.folder, "--target", str(tmp_path / "missing.csv")]) == 2
    assert main(["refit", gas.folder, "--target", str(bad), "--atom-classes", "C1"]) == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err and err.count("dihedra: error:") == 3


def test_refit_step_keys_are_the_keyword_arguments_and_it_runs(gas, targets, tmp_path):
    import inspect

    from dihedra.pipeline import STEPS, load_pipeline, run_pipeline

    expected = set(inspect.signature(fit_torsion_correction).parameters) - {"result", "log", "universe"}
    assert set(STEPS["refit"].keys) == expected
    toml = tmp_path / "a.toml"
    toml.write_text(f'out = "{gas.folder}"\nsteps = ["refit"]\n[refit]\ntarget = "{targets["populations"]}"\n'
                    "n_bootstrap = 5\nterms = 2\nsymmetric = false\n")
    if any(n.startswith("refit") for n in os.listdir(gas.folder)):   # an earlier test's fit: replaced when asked
        with pytest.raises(DihedraError, match="--overwrite"):
            run_pipeline(load_pipeline(str(toml)))
    run_pipeline(load_pipeline(str(toml), overwrite=True))
    assert pd.read_csv(os.path.join(gas.folder, "refit_terms.csv"))["n"].tolist() == [1, 2]
    # symmetric = false: sine terms as well (the default is a cosine series)
    assert json.load(open(os.path.join(gas.folder, "refit.json")))["parameters"]["symmetric"] is False
    assert "sin_kj_mol" in pd.read_csv(os.path.join(gas.folder, "refit_fourier.csv"))
    assert inspect.signature(fit_torsion_correction).parameters["symmetric"].default is True
    toml.write_text(toml.read_text().replace("symmetric = false", 'symmetric = "no"'))
    with pytest.raises(DihedraError, match="'symmetric' is a switch"):
        load_pipeline(str(toml), overwrite=True)
    with pytest.raises(DihedraError, match="symmetric must be true"):
        fit_torsion_correction(gas, targets["populations"], symmetric="no")


def test_figure_set_draws_the_refit_figure(profile_fit, gas, tmp_path):
    from dihedra.presentation import figures

    profile_fit.save(gas.folder)
    with figures.style():
        fset = figures.figure_set(gas.folder)
        items = [i for i in fset.items if i.kind == "refit"]
        assert [i.name for i in items] == ["refit_BUT_C1-C2-C3-C4"]
        ax = figures.plot_refit_populations(profile_fit.populations, TYPE)
        assert ax.get_ylabel() == figures.POPULATION_LABEL
        ax = figures.plot_correction(profile_fit.correction, TYPE)
        assert "kJ" in ax.get_ylabel()


def test_figures_types_choose_the_refit_figures_as_the_others(tmp_path):
    from dihedra.presentation import figures

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = track(os.path.join(EXAMPLES, "hexane.pdb"), [os.path.join(EXAMPLES, "hexane.xtc")], torsions="rotatable",
                    keep_angles=True, temperature_k=298.15, stop=100, out=str(tmp_path / "res"))
    types = list(dict.fromkeys(res.torsion_set.types))
    target = pd.DataFrame([{"type": t, "state": "anti", "population": 0.65, "population_err": 0.01} for t in types])
    fit_torsion_correction(res, target, n_bootstrap=3, regularisation=0.01).save(res.folder)
    inner = next(t for t in types if "C2-C3-C4-C5" in t)
    with figures.style():
        every = [i.name for i in figures.figure_set(res.folder).items if i.kind == "refit"]
        chosen = [i.name for i in figures.figure_set(res.folder, types=[inner]).items if i.kind == "refit"]
    assert every == ["refit_" + figures.safe_name(t) for t in types]   # none chosen: every corrected type
    assert chosen == ["refit_" + figures.safe_name(inner)]             # one chosen: its figure only


# ------------------------------------------------------------------------------------------------
# The real test of a correction: a new simulation with it
# ------------------------------------------------------------------------------------------------

@pytest.mark.slow
def test_a_new_simulation_with_the_fitted_correction_moves_the_populations_to_the_target(profile_fit, targets,
                                                                                         tmp_path):
    openmm = pytest.importorskip("openmm")
    script = load_script()
    fragment = tmp_path / "refit_openmm.xml"
    fragment.write_text(openmm_xml(
        profile_fit.terms, {TYPE: ("BUT", ["C1", "C2", "C3", "C4"])},
        atom_classes={"C1": "CH3", "C2": "CH2", "C3": "CH2", "C4": "CH3"}))
    n = 150
    made = correction_system(str(fragment), tmp_path, n_molecules=n)
    force = next(f for f in made.getForces() if isinstance(f, openmm.PeriodicTorsionForce))
    copy = openmm.XmlSerializer.serialize(force)
    prefix = str(tmp_path / "corrected")
    # start from the equilibrium of the uncorrected potential: the dynamics must move the populations
    script.simulate_butane_with_terms(prefix, n_molecules=n, n_frames=100, frame_interval_ps=2.0, temperature_k=T,
                                      extra_terms=(EXTRA,), more_forces=[lambda quads: openmm.XmlSerializer
                                                                         .deserialize(copy)],
                                      start_potential=lambda x: rb_energy(x) + periodic(x, [EXTRA]),
                                      equilibration_ps=20.0, seed=11)
    phi, _, _ = script.me.read_chain_torsions(prefix + ".pdb", prefix + ".xtc", 4)
    anti = float(np.mean(np.abs(phi) > 120))
    before = profile_fit.populations.set_index("state").loc["anti", "sampled_population"]
    target = targets["exact"]["anti"]
    assert abs(anti - target) < 0.02 and abs(anti - target) < abs(before - target) / 4


def test_sine_terms_are_named_and_a_symmetric_target_gives_none(gas, targets, tmp_path):
    # the Ryckaert-Bellemans potential is even in phi (V(phi) = V(-phi): an achiral molecule), so a
    # fit with sine terms onto it needs none; a target with 3 sin(phi) kJ/mol added is odd in part:
    # the sine terms that reach it are named with the advice to fit cosines alone (the default)
    # where no chiral centre allows them, and the default cosine-only fit cannot reach it and says so
    even = fit_torsion_correction(gas, targets["profile"], symmetric=False, n_bootstrap=20)
    assert not [n for n in even.notices if "phases other than 0 and 180" in n]
    grid = np.arange(-180.0, 180.01, 0.5)
    odd = tmp_path / "odd_profile.csv"
    pd.DataFrame({"angle_deg": grid, "free_energy_kj_mol": rb_energy(grid) + 3.0 * np.sin(np.radians(grid))}).to_csv(
        odd, index=False)
    fit = fit_torsion_correction(gas, str(odd), symmetric=False, n_bootstrap=20)
    named = [n for n in fit.notices if "phases other than 0 and 180" in n]
    assert len(named) == 1 and TYPE in named[0] and "without --sine-terms" in named[0]
    assert abs(fit.terms.set_index("n").loc[1, "sin_kj_mol"]) > 1.0
    cosines = fit_torsion_correction(gas, str(odd), n_bootstrap=5)
    assert (cosines.terms["sin_kj_mol"] == 0).all()
    assert [n for n in cosines.notices if "does not reach the target" in n and "--sine-terms" in n]
    # the run itself is mirror-symmetric: no notice that its sampled profile is not
    assert not [n for n in cosines.notices if "differs between phi and -phi" in n]


def test_a_cross_validated_strength_at_the_end_of_its_grid_is_named():
    # the grid's ends (1e-4 and 1): a score still falling there says the best may lie beyond it;
    # a strength inside the grid, or one given by the user (no cross-validation), is not named
    from dihedra.analysis.refit.notices import choice_notices as _choice_notices
    from dihedra.analysis.refit.fit import REGULARISATION_GRID

    grid = sorted(REGULARISATION_GRID)
    cv = pd.DataFrame({"regularisation": grid, "cv_score": np.linspace(2.0, 1.0, len(grid))})
    no_terms = pd.DataFrame(columns=["type", "sin_kj_mol", "sin_err_kj_mol"])
    for lam, side in ((grid[-1], "strongest"), (grid[0], "weakest")):
        named = _choice_notices({"lam": lam, "cv": cv}, no_terms, False)
        assert len(named) == 1 and f"the {side} regularisation" in named[0]
    assert not _choice_notices({"lam": grid[3], "cv": cv}, no_terms, False)
    assert not _choice_notices({"lam": grid[-1], "cv": cv.iloc[:0]}, no_terms, False)
