"""Profile barriers matched to transitions whatever energy unit the profile was written in."""

import numpy as np
import pandas as pd
import pytest

from dihedra.analysis.kinetics.estimators import _read_barrier_table, barriers_in_kj_mol
from dihedra.selection.schemes import get_scheme
from dihedra.units import R_KJ_PER_MOL_K


def barrier_table(suffix, factor):
    """A barriers.csv of one butane-like type: anti <-> gauche+ and anti <-> gauche- barriers."""
    kj = {"first": [12.35, 12.35], "second": [9.42, 9.42]}
    table = pd.DataFrame({"type": ["BUT:C1-C2-C3-C4"] * 2, "torsion": [np.nan, np.nan], "barrier": [1, 2],
                          "from_minimum_deg": [180.0, 180.0], "to_minimum_deg": [60.0, -60.0]})
    for side, values in kj.items():
        table[f"height_from_{side}_{suffix}"] = np.asarray(values) / factor
        table[f"height_from_{side}_err_{suffix}"] = 0.1 / factor
    return table


def test_barriers_in_other_units_are_read_in_kj_mol():
    # thermochemical calorie: 4.184 J exactly (NIST SP 811); kT = R T (CODATA 2018 R)
    scheme = get_scheme("anti-gauche")
    reference = _read_barrier_table(barrier_table("kj_mol", 1.0), scheme)
    assert len(reference) == 4
    kt = R_KJ_PER_MOL_K * 300.0
    for suffix, factor, temperature in (("kcal_mol", 4.184, None), ("kt", kt, 300.0)):
        read = _read_barrier_table(barriers_in_kj_mol(barrier_table(suffix, factor), temperature), scheme)
        assert read.keys() == reference.keys()
        for key, (height, err) in reference.items():
            assert np.isclose(read[key][0], height, rtol=1e-12) and np.isclose(read[key][1], err, rtol=1e-12)
    # kT without the profile's temperature cannot be converted: nothing is matched rather than a guess
    assert _read_barrier_table(barriers_in_kj_mol(barrier_table("kt", kt), None), scheme) == {}


def test_a_barrier_over_a_third_states_arc_goes_only_to_a_transition_that_took_it():
    # a glycine-like phi profile: minima at +73 (gauche+) and -72 (gauche-), anti a plateau without
    # a minimum; the barrier between the two minima the long way round has its top at -176, in the
    # anti arc (beyond +-120): the direct barrier (top at 2.5 degrees) is preferred, and without it
    # the one over anti goes to gauche+ <-> gauche- only if such transitions were seen
    from dihedra.analysis.kinetics.estimators import _add_tst

    scheme = get_scheme("anti-gauche")
    table = pd.DataFrame({"type": ["GLY:phi"] * 2, "torsion": [np.nan, np.nan], "barrier": [1, 2],
                          "from_minimum_deg": [-71.9, 72.7], "to_minimum_deg": [72.7, -71.9],
                          "angle_deg": [2.5, -176.5],
                          "height_from_first_kj_mol": [20.0, 6.1], "height_from_second_kj_mol": [21.0, 5.1]})
    mapping = _read_barrier_table(table, scheme)
    assert mapping[("type", "GLY:phi", "gauche-", "gauche+")][0] == 20.0
    assert mapping[("type", "GLY:phi", "gauche+", "gauche-")][0] == 21.0 and not mapping.crossing
    over = _read_barrier_table(table.iloc[1:], scheme)
    assert over.crossing == set(over) == {("type", "GLY:phi", "gauche-", "gauche+"),
                                          ("type", "GLY:phi", "gauche+", "gauche-")}
    transitions = pd.DataFrame({"level": ["type"] * 2, "name": ["GLY:phi"] * 2, "from_state": ["gauche+", "gauche-"],
                                "to_state": ["gauche-", "gauche+"], "count": [0, 4], "rate_per_ps": [0.0, 0.01]})
    _add_tst(transitions, 300.0, over, [])
    assert np.isnan(transitions["profile_barrier_kj_mol"].iloc[0])   # never seen: not this barrier's
    assert transitions["profile_barrier_kj_mol"].iloc[1] == 5.1


def test_klyne_prelog_barriers_lie_in_the_eclipsed_sectors_and_stay_with_their_transitions():
    # Klyne-Prelog (IUPAC): the barrier tops of a butane-like profile (+-120) lie in the +-ac
    # sectors, between the sc and ap minima: observed +sc -> ap transitions keep that barrier
    scheme = get_scheme("klyne-prelog")
    table = pd.DataFrame({"type": ["T"], "torsion": [np.nan], "barrier": [1], "from_minimum_deg": [62.0],
                          "to_minimum_deg": [179.0], "angle_deg": [121.0],
                          "height_from_first_kj_mol": [9.4], "height_from_second_kj_mol": [12.3]})
    mapping = _read_barrier_table(table, scheme)
    assert set(mapping) == mapping.crossing == {("type", "T", "+sc", "ap"), ("type", "T", "ap", "+sc")}
    from dihedra.analysis.kinetics.estimators import _add_tst

    transitions = pd.DataFrame({"level": ["type"] * 2, "name": ["T"] * 2, "from_state": ["+sc", "ap"],
                                "to_state": ["ap", "+sc"], "count": [12, 11], "rate_per_ps": [0.05, 0.01]})
    _add_tst(transitions, 300.0, mapping, [])
    assert transitions["profile_barrier_kj_mol"].tolist() == [9.4, 12.3]


def test_rates_faster_than_transition_state_theory_allows_are_named():
    # Eyring (CODATA 2018 constants): over 12 kJ/mol at 298.15 K transition-state theory allows at
    # most (k_B T / h) exp(-12 / RT) = 0.049 per ps; a rate whose 95 % interval lies above that (also
    # above the bound at the barrier lowered by two of its errors) contradicts the profile and is
    # named, one within it is not
    from dihedra.analysis.kinetics.estimators import _add_tst, eyring_rate_per_s

    bound = eyring_rate_per_s(12.0, 298.15) / 1e12
    assert bound == pytest.approx(0.0494, rel=0.01)
    mapping = {("type", "T", "anti", "gauche+"): (12.0, 0.3), ("type", "T", "gauche+", "anti"): (12.0, 0.3)}
    transitions = pd.DataFrame({"level": ["type"] * 2, "name": ["T"] * 2, "from_state": ["anti", "gauche+"],
                                "to_state": ["gauche+", "anti"], "rate_per_ps": [0.2, 0.04],
                                "rate_ci_low_per_ps": [0.15, 0.03]})
    notices = []
    _add_tst(transitions, 298.15, mapping, notices)
    named = [n for n in notices if "faster than transition-state theory" in n]
    assert len(named) == 1 and named[0].startswith("1 transition(s)") and "T anti -> gauche+" in named[0]
    # a barrier error of 2 kJ/mol lowers the bound to exp(4 / RT) times more: 0.2 / ps is within it
    notices = []
    _add_tst(transitions, 298.15, {k: (12.0, 2.0) for k in mapping}, notices)
    assert not [n for n in notices if "faster than transition-state theory" in n]


def test_a_transition_over_a_barrier_no_frame_reached_is_named():
    # features of a profile (common practice): a barrier whose top holds unsampled bins has no
    # height, only a lower bound; transitions counted across it (the torsion crossed between two
    # frames) get no profile barrier and a notice that says why, and unobserved ones none
    from dihedra.analysis.kinetics.estimators import _add_tst

    scheme = get_scheme("anti-gauche")
    table = pd.DataFrame({"type": ["BUT"] * 2, "torsion": [np.nan, np.nan], "barrier": [1, 2],
                          "from_minimum_deg": [180.0, 180.0], "to_minimum_deg": [60.0, -60.0],
                          "angle_deg": [120.0, -120.0], "sampled": [True, False],
                          "height_from_first_kj_mol": [14.0, np.nan], "height_from_second_kj_mol": [11.0, np.nan]})
    mapping = _read_barrier_table(table, scheme)
    assert mapping.unsampled == {("type", "BUT", "anti", "gauche-"), ("type", "BUT", "gauche-", "anti")}

    def transitions(counts):
        return pd.DataFrame({"level": ["type"] * 3, "name": ["BUT"] * 3,
                             "from_state": ["anti", "anti", "gauche-"], "to_state": ["gauche+", "gauche-", "anti"],
                             "count": counts, "rate_per_ps": [0.02, 0.02, 0.04]})

    seen, notices = transitions([10, 7, 0]), []
    _add_tst(seen, 300.0, mapping, notices)
    assert seen["profile_barrier_kj_mol"].iloc[0] == 14.0 and np.isnan(seen["profile_barrier_kj_mol"].iloc[1])
    named = [n for n in notices if "no frame reached" in n]
    assert len(named) == 1 and "BUT anti -> gauche- (7 seen)" in named[0] and "gauche- -> anti" not in named[0]
    quiet = []
    _add_tst(transitions([10, 0, 0]), 300.0, mapping, quiet)
    assert not [n for n in quiet if "no frame reached" in n]
    # a sampled barrier between the same states stands in: nothing is unsampled then
    both = pd.concat([table, table.iloc[[0]].assign(barrier=3, to_minimum_deg=-60.0, angle_deg=-120.0)])
    assert _read_barrier_table(both, scheme).unsampled == set()
