"""State schemes: dihedra's definitions (docs/tracking.md) and IUPAC's, custom TOML schemes, core sets."""

import numpy as np
import pytest

from dihedra.errors import SchemeError
from dihedra.selection.schemes import (NO_CORE, UNDEFINED, anti_gauche, get_scheme, klyne_prelog,
                             scheme_from_mapping, staggered_eclipsed)


def reference_anti_gauche(phi):
    # dihedra's anti-gauche definition (docs/tracking.md), written out plainly; anti/gauche split at
    # +-120 deg is common practice for sp3-sp3 torsions
    if abs(phi) > 120:
        return "anti"
    if 0 < phi <= 120:
        return "gauche+"
    return "gauche-"  # -120 <= phi <= 0


def reference_klyne_prelog(phi):
    # IUPAC sectors (Klyne & Prelog, Experientia 16 (1960) 521; Moss, Pure Appl. Chem. 68 (1996)
    # 2193): sp 0+-30, sc 30..90, ac 90..150, ap 150..180
    a = abs(phi)
    sign = "+" if phi > 0 else "-"
    if a < 30:
        return "sp"
    if a < 90:
        return sign + "sc"
    if a < 150:
        return sign + "ac"
    return "ap"


def test_anti_gauche_matches_definition_on_random_and_boundary_angles():
    rng = np.random.default_rng(0)
    angles = np.concatenate([rng.uniform(-180, 180, 20000),
                             [180.0, 120.0, -120.0, 0.0, 1e-9, -1e-9, 120.0 + 1e-9, -120.0 - 1e-9]])
    scheme = anti_gauche()
    got = [scheme.labels[c] for c in scheme.assign(angles)]
    assert got == [reference_anti_gauche(a) for a in angles]


def test_klyne_prelog_matches_iupac_sectors_away_from_boundaries():
    rng = np.random.default_rng(1)
    angles = rng.uniform(-180, 180, 20000)
    # boundary ownership is not specified by IUPAC (Moss 1996, from memory): avoid exactly 30/90/150
    angles = angles[np.min(np.abs(np.abs(angles)[:, None] - [30, 90, 150]), axis=1) > 1e-6]
    scheme = klyne_prelog()
    got = [scheme.labels[c] for c in scheme.assign(angles)]
    assert got == [reference_klyne_prelog(a) for a in angles]
    assert scheme.labels == ("sp", "+sc", "+ac", "ap", "-ac", "-sc")


@pytest.mark.parametrize("n", [1, 2, 3, 6])
def test_staggered_within_half_sector_of_staggered_positions(n):
    # dihedra's definition (docs/tracking.md): staggered within 180/(2n) of 180 + k 360/n
    # (inclusive), eclipsed otherwise
    rng = np.random.default_rng(n)
    angles = rng.uniform(-180, 180, 5000)
    centres = 180.0 + np.arange(n) * 360.0 / n
    dist = np.min(np.abs((angles[:, None] - centres + 180.0) % 360.0 - 180.0), axis=1)
    expected = np.where(dist <= 180.0 / (2 * n), "staggered", "eclipsed")
    scheme = get_scheme(f"staggered-eclipsed:{n}") if n != 3 else get_scheme("staggered-eclipsed")
    got = np.array(scheme.labels)[scheme.assign(angles)]
    assert (got == expected).all()
    assert scheme.labels == ("staggered", "eclipsed")


def test_three_fold_positions():
    s = staggered_eclipsed(3)
    assert [s.labels[c] for c in s.assign([60, 180, -60, 0, 120, -120])] == \
        ["staggered"] * 3 + ["eclipsed"] * 3


def test_nan_is_undefined():
    assert anti_gauche().assign([np.nan]).tolist() == [UNDEFINED]


def test_custom_scheme_wraps_through_180_and_merges_repeated_labels():
    scheme = scheme_from_mapping({"name": "t-or-g", "state": [
        {"label": "trans", "from_deg": 150, "to_deg": -150},
        {"label": "g", "from_deg": -150, "to_deg": 0},
        {"label": "g", "from_deg": 0, "to_deg": 150}]})
    assert scheme.labels == ("trans", "g")
    got = [scheme.labels[c] for c in scheme.assign([180, -170, 170, 0, 100, -100, 150, -150])]
    # arcs are open at from_deg and closed at to_deg
    assert got == ["trans", "trans", "trans", "g", "g", "g", "g", "trans"]


def test_custom_scheme_gap_and_overlap_are_clear_errors():
    with pytest.raises(SchemeError, match="gap from 60 to 90"):
        scheme_from_mapping({"state": [{"label": "a", "from_deg": -180, "to_deg": 60},
                                       {"label": "b", "from_deg": 90, "to_deg": 180}]})
    with pytest.raises(SchemeError, match="overlap"):
        scheme_from_mapping({"state": [{"label": "a", "from_deg": -180, "to_deg": 90},
                                       {"label": "b", "from_deg": 60, "to_deg": 180}]})
    with pytest.raises(SchemeError, match="unknown"):
        scheme_from_mapping({"state": [{"label": "a", "from_deg": 0, "to_deg": 10, "colour": "red"}]})


def test_unknown_scheme_lists_valid_ones():
    with pytest.raises(SchemeError, match="anti-gauche, staggered-eclipsed, klyne-prelog"):
        get_scheme("trans-gauche")


def test_core_codes_shrink_each_state_by_the_margin():
    s = anti_gauche()
    codes = s.core_codes([180, 125, 139, 141, 60, 15, 25, -60, -125, -141], 20)
    labels = [s.labels[c] if c >= 0 else c for c in codes]
    # anti core |phi| >= 140, gauche+ core 20..100, gauche- core -100..-20
    assert labels == ["anti", NO_CORE, NO_CORE, "anti", "gauche+", NO_CORE, "gauche+", "gauche-",
                      NO_CORE, "anti"]


def test_scheme_round_trips_through_its_dict():
    for name in ("anti-gauche", "klyne-prelog", "staggered-eclipsed:2"):
        s = get_scheme(name)
        assert type(s).from_dict(s.to_dict()) == s


def test_protein_schemes_by_their_definitions():
    # cis-trans: the two planar wells of a peptide bond split at +-90 (common practice; cis = omega
    # near 0, IUPAC-IUB, J. Mol. Biol. 52 (1970) 1)
    ct = get_scheme("cis-trans")
    assert [ct.labels[c] for c in ct.assign([180.0, -179.0, 91.0, 90.0, -90.0, 0.0, 30.0, -89.9])] == \
        ["trans", "trans", "trans", "trans", "trans", "cis", "cis", "cis"]
    protein = get_scheme("protein")
    # staggered chi wells g+ (+60), t (180), g- (-60) (Janin et al., J. Mol. Biol. 125 (1978) 357;
    # IUPAC-IUB 1970 sign)
    chi1 = protein.for_type("VAL:chi1")
    assert [protein.labels[c] for c in chi1.assign([60.0, 180.0, -60.0, 121.0, -121.0])] == \
        ["g+", "t", "g-", "t", "t"]
    # Phe chi2 wells at +-90 (ring perpendicular; Lovell et al., Proteins 40 (2000) 389, p90, t80,
    # m-85) and the symmetric end: chi2 and chi2 + 180 are the same state
    phe = protein.for_type("PHE:chi2")
    for a in (90.0, -85.0, 80.0, 10.0, -170.0):
        assert phe.assign([a])[0] == phe.assign([a - 180.0 if a > 0 else a + 180.0])[0]
    assert protein.labels[phe.assign([90.0])[0]] == "90/-90"
    assert protein.labels[phe.assign([-30.0])[0]] == "0/180"       # Lovell's m-30
    # His chi2 (not symmetric): Lovell's p80, t-160, m-70 in three different wells
    his = protein.for_type("HSD:chi2")
    assert [protein.labels[his.assign([a])[0]] for a in (80.0, -160.0, -70.0, 0.0)] == ["+90", "180", "-90", "0"]
    # phi, psi and other torsions keep anti-gauche; the nucleic-acid glycosidic chi too
    assert protein.states_of_type("ALA:psi") == ["anti", "gauche+", "gauche-"]
    assert protein.states_of_type("G:chi") == ["anti", "gauche+", "gauche-"]
    # the default scheme: protein for protein torsions only
    from dihedra.selection.choice import default_scheme

    assert default_scheme(["protein-backbone", "protein-sidechains"]) == "protein"
    assert default_scheme("rotatable") == "anti-gauche"
    assert default_scheme(["protein-backbone", "rotatable"]) == "anti-gauche"


def test_syn_anti_and_sugar_pucker_sectors():
    # IUPAC-IUB, Eur. J. Biochem. 131 (1983) 9: syn = chi 0 +- 90, anti = chi 180 +- 90 (the
    # boundary angles themselves are ours: anti closed at +-90, as trans is for omega)
    from dihedra.selection.schemes import sugar_pucker, syn_anti

    s = syn_anti()
    chi = [-160.0, -105.0, -90.0, -89.9, 0.0, 60.0, 89.9, 90.0, 180.0]
    assert [s.labels[c] for c in s.assign(chi)] == ["anti", "anti", "anti", "syn", "syn", "syn", "syn", "anti",
                                                   "anti"]
    # delta near 80 (C3'-endo, A-form) and near 145 (C2'-endo, B-form): Saenger 1984, from memory
    p = sugar_pucker()
    delta = [80.0, 115.0, 115.1, 145.0, 180.0, -179.0, -20.0, 0.0, 0.1]
    assert [p.labels[c] for c in p.assign(delta)] == ["C3'-endo", "C3'-endo", "C2'-endo", "C2'-endo", "C2'-endo",
                                                     "atypical", "atypical", "atypical", "C3'-endo"]
    nucleic = get_scheme("nucleic")
    assert nucleic.states_of_type("DA:chi") == ["anti", "syn"]
    assert nucleic.states_of_type("U:delta") == ["C3'-endo", "C2'-endo", "atypical"]
    assert nucleic.states_of_type("DG:alpha") == ["g+", "t", "g-"]   # (Saenger's names for the backbone)
