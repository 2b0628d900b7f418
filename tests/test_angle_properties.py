"""Property-based tests (hypothesis) of the torsion angle and of the state assignment.

The torsion angle of A-B-C-D is defined by IUPAC (Moss, Pure Appl. Chem. 68 (1996) 2193) from the
positions of the four atoms alone: it cannot change under a rigid motion of the molecule
(rotation and translation), nor when an atom is replaced by one of its periodic images (the bond
vectors are taken as minimum images), nor when the torsion is read backwards (D-C-B-A: the same
angle, by the definition's symmetry), and it changes sign in a mirror image (the sign is the sense
of rotation, which a reflection reverses). MDAnalysis' ``calc_dihedrals`` (reference library)
gives the same angle. States are functions of the angle on the circle: the same for a + 360 k,
the same through the compiled pass as through :meth:`StateScheme.assign`, and exchanged between
mirror states (gauche+ and gauche-) by a reflection.
"""

import numpy as np
import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

from conftest import place_fourth
from dihedra.numerics.angles import torsion_angles_deg
from dihedra.selection.schemes import get_scheme

SETTINGS = settings(max_examples=60, deadline=None, database=None, suppress_health_check=[HealthCheck.too_slow])
coordinate = st.floats(-3.0, 3.0, allow_nan=False, width=32)


def circular_gap(a, b):
    """Smallest difference of two angles in degrees."""
    return np.abs((np.asarray(a, float) - np.asarray(b, float) + 180.0) % 360.0 - 180.0)


@st.composite
def torsions(draw, with_angle=False):
    """Four atoms with a well-defined angle, built from internal coordinates (natural extension
    reference frame, common practice): bonds of 1-2 A, bond angles of 30-150 degrees (a nearly
    collinear torsion, whose angle is undefined, is left out), a torsion angle phi, then turned
    and moved anywhere."""
    l1, l2, l3 = (draw(st.floats(1.0, 2.0)) for _ in range(3))
    th1, th2 = (np.radians(draw(st.floats(30.0, 150.0))) for _ in range(2))
    phi = draw(st.floats(-180.0, 180.0))
    a, b, c = np.array([l1 * np.sin(th1), l1 * np.cos(th1), 0.0]), np.zeros(3), np.array([0.0, l2, 0.0])
    d = place_fourth(a[None], b[None], c[None], l3, np.degrees(th2), np.array([phi]))[0]
    xyz = np.array([a, b, c, d]) @ draw(rotations()).T + np.array([draw(coordinate) for _ in range(3)])
    return (xyz, phi) if with_angle else xyz


@st.composite
def rotations(draw):
    """A random proper rotation (a unit quaternion)."""
    q = np.array([draw(st.floats(-1, 1, allow_nan=False)) for _ in range(4)])
    assume(np.linalg.norm(q) > 0.1)
    w, x, y, z = q / np.linalg.norm(q)
    return np.array([[1 - 2 * (y * y + z * z), 2 * (x * y - z * w), 2 * (x * z + y * w)],
                     [2 * (x * y + z * w), 1 - 2 * (x * x + z * z), 2 * (y * z - x * w)],
                     [2 * (x * z - y * w), 2 * (y * z + x * w), 1 - 2 * (x * x + y * y)]])


@SETTINGS
@given(torsions(with_angle=True))
def test_the_angle_of_a_constructed_torsion(built):
    xyz, phi = built
    assert circular_gap(angle(xyz), phi) < 0.02


def angle(xyz, order=(0, 1, 2, 3), box=None):
    return float(torsion_angles_deg(np.asarray(xyz, dtype=np.float32), np.array([order]), box=box)[0])


# ----------------------------------------------------------------------------------------------
# the angle
# ----------------------------------------------------------------------------------------------

@SETTINGS
@given(torsions(), rotations(), st.tuples(*[st.floats(-50, 50, allow_nan=False)] * 3))
def test_invariant_under_rigid_motion(xyz, rot, shift):
    moved = xyz @ rot.T + np.asarray(shift)
    # float32 coordinates: agreement to a few thousandths of a degree for these geometries
    assert circular_gap(angle(moved), angle(xyz)) < 0.02


@SETTINGS
@given(torsions())
def test_the_same_read_backwards_and_mirrored_in_sign(xyz):
    a = angle(xyz)
    assert circular_gap(angle(xyz, order=(3, 2, 1, 0)), a) < 1e-3
    mirrored = xyz * np.array([-1.0, 1.0, 1.0])
    assert circular_gap(angle(mirrored), -a) < 1e-3
    assert -180.0 < a <= 180.0


@SETTINGS
@given(torsions(), st.lists(st.tuples(*[st.integers(-3, 3)] * 3), min_size=4, max_size=4),
       st.sampled_from(["orthorhombic", "triclinic"]))
def test_invariant_under_periodic_images(xyz, images, cell):
    from MDAnalysis.lib.mdamath import triclinic_vectors

    box = np.array([30.0, 34.0, 38.0, 90.0, 90.0, 90.0] if cell == "orthorhombic" else
                   [30.0, 34.0, 38.0, 70.0, 80.0, 100.0], dtype=np.float32)
    h = triclinic_vectors(box).astype(np.float64)
    centred = xyz + np.array([15.0, 17.0, 19.0])
    shifted = centred + np.asarray(images, dtype=np.float64) @ h
    # each atom replaced by one of its images: the minimum-image bond vectors are the same
    assert circular_gap(angle(shifted, box=box), angle(centred, box=box)) < 0.02
    assert circular_gap(angle(centred, box=box), angle(centred)) < 1e-3


@SETTINGS
@given(torsions())
def test_agrees_with_mdanalysis(xyz):
    from MDAnalysis.lib.distances import calc_dihedrals

    p = np.asarray(xyz, dtype=np.float32)
    ref = np.degrees(calc_dihedrals(p[0], p[1], p[2], p[3]))
    assert circular_gap(angle(xyz), ref) < 1e-3


# ----------------------------------------------------------------------------------------------
# the states
# ----------------------------------------------------------------------------------------------

SCHEMES = ["anti-gauche", "staggered-eclipsed", "klyne-prelog"]
exact_angle = st.integers(-180 * 1024 + 1, 180 * 1024).map(lambda k: k / 1024.0)   # exact binary fractions


@SETTINGS
@given(st.lists(exact_angle, min_size=1, max_size=50), st.integers(-3, 3), st.sampled_from(SCHEMES))
def test_states_are_periodic(angles, turns, name):
    scheme = get_scheme(name)
    a = np.array(angles)
    assert (scheme.assign(a + 360.0 * turns) == scheme.assign(a)).all()


@SETTINGS
@given(st.lists(exact_angle, min_size=1, max_size=50))
def test_mirror_images_exchange_gauche_plus_and_minus(angles):
    scheme = get_scheme("anti-gauche")
    a = np.array(angles)
    away = np.min(np.abs(np.abs(a)[:, None] - np.array([0.0, 120.0, 180.0])[None]), axis=1) > 1e-6
    a = a[away]   # the boundaries themselves belong to one side by convention
    swap = {"anti": "anti", "gauche+": "gauche-", "gauche-": "gauche+"}
    labels = np.array(scheme.labels)
    assert [swap[s] for s in labels[scheme.assign(a)]] == list(labels[scheme.assign(-a)])


@settings(max_examples=15, deadline=None, database=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(torsions(), min_size=3, max_size=12), st.sampled_from(SCHEMES))
def test_the_pass_assigns_the_states_of_the_scheme(frames, name):
    """The compiled pass (fine bins and a table, exact rule at the boundaries) gives the codes of
    :meth:`StateScheme.assign` of the float32 angles, frame by frame."""
    import MDAnalysis as mda
    from MDAnalysis.coordinates.memory import MemoryReader

    from dihedra import TorsionStates

    coords = np.asarray(frames, dtype=np.float32)
    u = mda.Universe.empty(4, n_residues=1, atom_resindex=[0, 0, 0, 0], trajectory=True)
    u.add_TopologyAttr("names", ["C1", "C2", "C3", "C4"])
    u.add_TopologyAttr("resnames", ["BUT"])
    u.add_TopologyAttr("resids", [1])
    u.load_new(coords, format=MemoryReader)
    scheme = get_scheme(name)
    run = TorsionStates(u.atoms, "0,1,2,3", scheme).run()
    states = run.results.states.iloc[:, -1].to_numpy()
    expected = scheme.assign(torsion_angles_deg(coords[0], np.array([[0, 1, 2, 3]])) if len(coords) == 1 else
                             np.array([torsion_angles_deg(c, np.array([[0, 1, 2, 3]]))[0] for c in coords]))
    assert (states == expected).all()


def test_a_nearly_planar_torsion_keeps_its_sign():
    # a cis torsion whose fourth atom sits 1.4e-25 A off the plane: its float32 angle is
    # +1.6e-23 degrees, which the scheme and the pass both put in gauche+ (0, 120] (the arc
    # boundary at 0 belongs to gauche-; the angle must not be rounded onto it)
    import MDAnalysis as mda
    from MDAnalysis.coordinates.memory import MemoryReader

    from dihedra import TorsionStates

    plane = np.array([[-0.5, -0.8660254, 0.0], [0.0, 0.0, 0.0], [0.0, -1.0, 0.0], [-0.5, -0.1339746, 0.0]])
    off = plane.copy()
    off[3, 2] = -1.3827618e-25
    coords = np.asarray([plane, off], dtype=np.float32)
    angle = torsion_angles_deg(coords[1], np.array([[0, 1, 2, 3]]))[0]
    assert 0.0 < angle < 1e-20
    scheme = get_scheme("anti-gauche")
    assert scheme.labels[scheme.assign([angle])[0]] == "gauche+"
    assert scheme.labels[scheme.assign([0.0])[0]] == "gauche-"
    u = mda.Universe.empty(4, n_residues=1, atom_resindex=[0, 0, 0, 0], trajectory=True)
    u.add_TopologyAttr("names", ["C1", "C2", "C3", "C4"])
    u.add_TopologyAttr("resnames", ["BUT"])
    u.add_TopologyAttr("resids", [1])
    u.load_new(coords, format=MemoryReader)
    states = TorsionStates(u.atoms, "0,1,2,3", scheme).run().results.states.iloc[:, -1].to_numpy()
    np.testing.assert_array_equal(states, scheme.assign([torsion_angles_deg(c, np.array([[0, 1, 2, 3]]))[0]
                                                         for c in coords]))


@pytest.mark.parametrize("name", SCHEMES)
def test_every_angle_has_one_state(name):
    # the arcs of a scheme cover the circle once: a fine grid (and the boundaries) all get a state
    scheme = get_scheme(name)
    grid = np.concatenate([np.linspace(-179.999, 180.0, 36001), np.asarray(scheme.boundaries_deg, float)])
    codes = scheme.assign(grid)
    assert (codes >= 0).all() and (codes < scheme.n_states).all()
