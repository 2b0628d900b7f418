r"""Ensemble-averaged 3J couplings (Karplus relations) and their comparison with experiment.

:func:`ensemble_couplings` averages one or more Karplus relations over the sampled torsion
distributions of a tracking result (the fine block histograms, weighted when the run was) and,
given measured values, compares them; the result's ``save(folder)`` writes the files of each
relation: ``couplings_<relation>.csv``, ``couplings_<relation>_vs_experiment.csv`` and
``couplings_<relation>.json`` (so that runs with different relations keep their results apart).

Modules
-------
:mod:`~dihedra.analysis.couplings.relations`
    The relations: forms, published parameters and their sources (Karplus, J. Chem. Phys. 30
    (1959) 11; Vuister & Bax, J. Am. Chem. Soc. 115 (1993) 7772; Hu & Bax, J. Am. Chem. Soc. 119
    (1997) 6360; Pardi, Billeter & Wuthrich, J. Mol. Biol. 180 (1984) 741; Haasnoot, de Leeuw &
    Altona, Tetrahedron 36 (1980) 2783), custom relations from TOML, Haasnoot-Altona substituents.
:mod:`~dihedra.analysis.couplings.ensemble`
    The ensemble average, its statistical error and the relation's systematic spread.
:mod:`~dihedra.analysis.couplings.experiment`
    Measured couplings: reading them, deviations, chi-square and a verdict per relation.
"""

from .ensemble import (CouplingResult, choose_torsions, coupling_file_names, couplings_from_histograms,
                       ensemble_couplings, relation_kernels)
from .experiment import (OUTLIER_Z, P_INCONSISTENT, P_TENSION, VERDICT_RULES, compare_with_experiment,
                         read_experimental)
from .relations import (APPLIES_TO, BUILTIN_RELATIONS, FORMS, HN_HA_FAMILY, HUGGINS_ELECTRONEGATIVITY,
                        KarplusRelation, get_relation, relation_from_toml, substituents_of)

__all__ = [
    "APPLIES_TO", "BUILTIN_RELATIONS", "FORMS", "HN_HA_FAMILY", "HUGGINS_ELECTRONEGATIVITY", "OUTLIER_Z",
    "P_INCONSISTENT", "P_TENSION", "VERDICT_RULES", "CouplingResult", "KarplusRelation", "choose_torsions",
    "coupling_file_names",
    "compare_with_experiment", "couplings_from_histograms", "ensemble_couplings", "get_relation",
    "read_experimental", "relation_from_toml", "relation_kernels", "substituents_of",
]
