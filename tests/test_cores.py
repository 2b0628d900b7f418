"""The core bit of every frame that the trajectory pass records (cores.parquet): exactly the core
membership of the scheme's rule (StateScheme.core_codes, the cores of Buchete & Hummer, J. Phys.
Chem. B 112 (2008) 6057: each sector shrunk by the margin on both sides), for built-in schemes,
sets of schemes and a custom scheme whose edges float32 cannot hold."""

import numpy as np
import pytest

from dihedra.selection.schemes import get_scheme, scheme_from_mapping
from dihedra.trajectory.cores import CORE_MARGIN_DEG, CoreBits


def pass_bins(deg, n_bins):
    """The fine bin the pass gives a float32 angle: k = ceil(a / w) + n_bins / 2 (0 when undefined)."""
    width = np.float32(360.0 / n_bins)
    k = np.ceil(deg / width) + n_bins // 2
    return np.where(np.isnan(deg), 0, k).astype(np.uint16)


CUSTOM = {"state": [{"label": "a", "from_deg": -33.3, "to_deg": 90.7},
                    {"label": "b", "from_deg": 90.7, "to_deg": -33.3}]}


@pytest.mark.parametrize("spec, types", [
    ("anti-gauche", ["X"] * 4), ("klyne-prelog", ["X"] * 4), ("cis-trans", ["X"] * 4),
    ("protein", ["ALA:phi", "ALA:omega", "ARG:chi1", "PHE:chi2"]), ("custom", ["X"] * 4)])
@pytest.mark.parametrize("n_bins", [360, 720])
def test_core_bits_are_the_core_rule(spec, types, n_bins):
    scheme = scheme_from_mapping(CUSTOM) if spec == "custom" else get_scheme(spec)
    rng = np.random.default_rng(1)
    deg = rng.uniform(-180, 180, (50_000, 4)).astype(np.float32)
    edges = []
    for part in scheme.coded_parts():
        for _, start, end in part.merged_arcs():
            edges += [start + CORE_MARGIN_DEG, end - CORE_MARGIN_DEG]
    edges = np.float32((np.array(edges) + 180.0) % 360.0 - 180.0)
    # the edges themselves and their float32 neighbours, 180 and undefined angles
    near = np.concatenate([edges, np.nextafter(edges, np.float32(200)), np.nextafter(edges, np.float32(-200)),
                           np.float32([180.0, -179.99998, np.nan])])
    deg[:len(near)] = near[:, None]
    out = np.empty(deg.shape, dtype=bool)
    CoreBits(scheme, types, n_bins)(pass_bins(deg, n_bins), deg, out)
    expected = np.stack([scheme.for_type(t).core_codes(deg[:, k], CORE_MARGIN_DEG) >= 0
                         for k, t in enumerate(types)], axis=1)
    np.testing.assert_array_equal(out, expected)
    assert 0.2 < out.mean() < 0.9
    # a range of torsions at a time (as the two threads of the pass share them): the same bits
    parts = np.empty_like(out)
    bins = pass_bins(deg, n_bins)
    for t0, t1 in ((0, 1), (1, 3), (3, 4)):
        CoreBits(scheme, types, n_bins)(bins[:, t0:t1], deg[:, t0:t1], parts[:, t0:t1], t0, t1)
    np.testing.assert_array_equal(parts, expected)
