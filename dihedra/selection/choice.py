"""Choosing the state scheme of every torsion type: one scheme for all, ``auto``, ``basins``, or a
scheme map.

:func:`choose_schemes` turns what a user gives (``--scheme``) into a :class:`SchemeChoice`: the
scheme of each torsion type and why. ``auto`` asks the chemistry of the central bond
(:mod:`dihedra.selection.chemistry`); ``basins`` is decided by the sampled distribution, so those
types wait for the data (:mod:`dihedra.trajectory.basins` resolves them); a **scheme map** (a TOML
file of our own) gives each type the scheme of the first rule it matches:

.. code-block:: toml

    name = "drug"               # optional: the name of the set of schemes
    default = "basins"          # types that no rule matches (default: "auto")

    [[rule]]
    bond = ["amide", "ester"]   # the class of the central bond, as 'dihedra torsions --scheme auto' lists
    scheme = "cis-trans"

    [[rule]]
    types = ["LIG:C1-C2-*", "POPC:C2?-C2?-C2?-C2?"]   # torsion types, shell-style patterns
    scheme = "anti-gauche"

    [[rule]]
    torsions = "protein-sidechains"   # a torsion specification: the types of what it selects
    scheme = "chi-rotamers"

A rule holds ``scheme`` and one or more of ``bond``, ``types`` and ``torsions`` (a string or a list;
all that it names must match). ``scheme`` is a built-in scheme (``anti-gauche``, ``cis-trans``,
``protein``, ...; a set of schemes gives the type its own part), ``auto``, ``basins``, or a
``.toml`` file of named sectors (a relative path is taken from the map's folder). A type is never
split: all its torsions follow one scheme.
"""

from __future__ import annotations

import fnmatch
import os
from dataclasses import dataclass, field

import pandas as pd

from ..errors import SchemeError, SelectionError, read_toml
from .schemes import SchemeSet, StateScheme, anti_gauche, get_scheme, scheme_by_type
from .specs import select_torsions

#: The placeholder of a type whose states come from the sampled distribution.
BASINS = "basins"
#: Keys of a rule of a scheme map.
RULE_KEYS = ("bond", "types", "torsions", "scheme")


@dataclass
class SchemeChoice:
    """The scheme of every torsion type, and why.

    Attributes
    ----------
    name : str
        What was asked (``auto``, ``basins``, a scheme map's name, a scheme's name).
    by_type : dict
        Torsion type -> :class:`StateScheme`, or :data:`BASINS` for a type whose basins come from
        the data.
    reasons : dict
        Torsion type -> why it follows its scheme.
    fixed : StateScheme or SchemeSet or None
        The scheme itself when one was given for all torsions.
    table : DataFrame or None
        The chemistry of every torsion (:func:`~dihedra.selection.chemistry.classify_torsions`)
        when it was asked.
    notices : list of str
    """

    name: str
    by_type: dict
    reasons: dict
    fixed: object = None
    table: pd.DataFrame | None = None
    notices: list = field(default_factory=list)

    @property
    def basin_types(self):
        """The types whose states come from the sampled distribution."""
        return [t for t, s in self.by_type.items() if isinstance(s, str) and s == BASINS]

    @property
    def needs_data(self):
        return bool(self.basin_types)

    def provisional(self):
        """The scheme with ``anti-gauche`` standing in for the basins (for a pass before them)."""
        return self.resolve({t: anti_gauche() for t in self.basin_types})

    def resolve(self, basins=None):
        """The scheme of the run: the given one, or a set of one scheme per type with the basins
        (type -> :class:`StateScheme`) in place."""
        if self.fixed is not None:
            return self.fixed
        basins = basins or {}
        missing = [t for t in self.basin_types if t not in basins]
        if missing:
            raise SchemeError(f"no basins for the torsion type(s) {', '.join(missing[:3])}; the states of "
                              "--scheme basins come from a trajectory.")
        return scheme_by_type(self.name, {t: basins[t] if t in basins else s for t, s in self.by_type.items()})

    def rows(self):
        """One row per type: ``type``, ``scheme``, ``reason``."""
        return pd.DataFrame([(t, s if isinstance(s, str) else s.name, self.reasons.get(t, ""))
                             for t, s in self.by_type.items()], columns=["type", "scheme", "reason"])

    def record(self):
        """What summary.json keeps of the choice."""
        return {"asked": self.name, "types": self.rows().to_dict(orient="records")}


def _types(tset):
    return list(dict.fromkeys(tset.types))


def _given(name, scheme, tset, reason):
    by_type = {t: (scheme.parts[scheme.part_index(t)] if isinstance(scheme, SchemeSet) else scheme)
               for t in _types(tset)}
    return SchemeChoice(name=name, by_type=by_type, reasons={t: reason for t in by_type}, fixed=scheme)


def default_scheme(torsions):
    """The scheme a run uses when none is given: ``protein`` when every specification is a
    protein one (``protein-backbone``, ``protein-sidechains``), ``nucleic`` for ``nucleic-backbone``
    alone, else ``anti-gauche``."""
    specs = [torsions] if isinstance(torsions, str) else list(torsions or []) if not hasattr(torsions, "torsions") else []
    if specs and all(str(x).strip() in ("protein-backbone", "protein-sidechains") for x in specs):
        return "protein"
    if specs and all(str(x).strip() == "nucleic-backbone" for x in specs):
        return "nucleic"
    return "anti-gauche"


def choose_schemes(spec, universe, tset, torsions=None):
    """The scheme of every torsion type of ``tset``.

    Parameters
    ----------
    spec : str, StateScheme, SchemeSet or None
        A scheme name, ``auto``, ``basins``, a ``.toml`` file (named sectors or a scheme map), or a
        scheme; ``None``: the default for ``torsions`` (:func:`default_scheme`).
    universe : MDAnalysis.Universe
    tset : TorsionSet
    torsions : str or list, optional
        The torsion specifications (for the default).

    Returns
    -------
    SchemeChoice

    Examples
    --------
    >>> import MDAnalysis as mda
    >>> from dihedra import example_path
    >>> u = mda.Universe(example_path("butane_rb.pdb"))
    >>> choice = choose_schemes("auto", u, select_torsions(u, "rotatable"))
    >>> choice.rows()[["type", "scheme"]].values.tolist()
    [['BUT:C1-C2-C3-C4', 'anti-gauche']]
    """
    if spec is None:
        scheme = get_scheme(default_scheme(torsions))
        return _given(scheme.name, scheme, tset, "the default for these torsions")
    if isinstance(spec, (StateScheme, SchemeSet)):
        return _given(spec.name, spec, tset, "given")
    text = os.fspath(spec).strip() if isinstance(spec, (str, os.PathLike)) else str(spec)
    if text == "auto":
        return _auto(universe, tset)
    if text == BASINS:
        return SchemeChoice(name=BASINS, by_type={t: BASINS for t in _types(tset)},
                            reasons={t: "the basins of the sampled distribution" for t in _types(tset)})
    if text.lower().endswith(".toml") and _is_map(text):
        return _from_map(text, universe, tset)
    scheme = get_scheme(text)
    return _given(scheme.name, scheme, tset, "given")


def _auto(universe, tset, name="auto"):
    from .chemistry import classify_torsions, schemes_by_type   # (only for auto: not imported by other runs)

    table = classify_torsions(universe, tset)
    choices, notices = schemes_by_type(table)
    return SchemeChoice(name=name, by_type={t: get_scheme(s) for t, (s, _) in choices.items()},
                        reasons={t: r for t, (_, r) in choices.items()}, table=table, notices=notices)


def _is_map(path):
    data = _read_toml(path)
    return "rule" in data or "default" in data


def _read_toml(path):
    return read_toml(path, "scheme file", SchemeError)


def _as_list(value, where, key):
    values = [value] if isinstance(value, str) else value
    if not isinstance(values, list) or not values or not all(isinstance(v, str) for v in values):
        raise SchemeError(f"{where}: '{key}' must be a string or a list of strings; got {value!r}.")
    return values


def _rule_scheme(value, folder, where):
    """A rule's scheme: ``auto``, ``basins``, or a scheme (a relative .toml path from ``folder``)."""
    if not isinstance(value, str) or not value.strip():
        raise SchemeError(f"{where}: 'scheme' must name a scheme (e.g. cis-trans, auto, basins); got {value!r}.")
    value = value.strip()
    if value in ("auto", BASINS):
        return value
    if value.lower().endswith(".toml") and not os.path.isabs(value):
        value = os.path.join(folder, value)
    try:
        return get_scheme(value)
    except SchemeError as exc:
        raise SchemeError(f"{where}: {exc}") from None


def _parse_map(path):
    """``(name, default, rules)`` of a scheme map; each rule a dict of lists and its scheme."""
    data = _read_toml(path)
    folder = os.path.dirname(os.path.abspath(path))
    unknown = sorted(set(data) - {"name", "default", "rule"})
    if unknown:
        raise SchemeError(f"scheme map {path}: unknown key(s) {', '.join(unknown)}; valid keys are name, default, "
                          "rule.")
    rules = []
    for k, rule in enumerate(data.get("rule", []), start=1):
        where = f"scheme map {path}, rule {k}"
        if not isinstance(rule, dict):
            raise SchemeError(f"{where}: each rule is a [[rule]] table.")
        bad = sorted(set(rule) - set(RULE_KEYS))
        if bad:
            raise SchemeError(f"{where}: unknown key(s) {', '.join(bad)}; valid keys are {', '.join(RULE_KEYS)}.")
        if "scheme" not in rule or not set(rule) & {"bond", "types", "torsions"}:
            raise SchemeError(f"{where}: a rule needs 'scheme' and at least one of bond, types, torsions.")
        parsed = {key: _as_list(rule[key], where, key) for key in ("bond", "types", "torsions") if key in rule}
        parsed["scheme"] = _rule_scheme(rule["scheme"], folder, where)
        parsed["text"] = ", ".join(f"{key} = {' | '.join(parsed[key])}" for key in ("bond", "types", "torsions")
                                   if key in parsed)
        rules.append(parsed)
    default = _rule_scheme(data.get("default", "auto"), folder, f"scheme map {path}, default")
    name = str(data.get("name") or os.path.splitext(os.path.basename(path))[0])
    return name, default, rules


def _from_map(path, universe, tset):
    """The choice of a scheme map: each type the scheme of the first rule it matches."""
    name, default, rules = _parse_map(path)
    auto = _auto(universe, tset, name)
    bond_of = auto.table.groupby("type", sort=False)["bond"].agg(lambda x: x.value_counts().index[0]).to_dict()
    notices = list(auto.notices)
    selected = {}
    for rule in rules:
        for spec in rule.get("torsions", []):
            if spec not in selected:
                try:
                    selected[spec] = set(select_torsions(universe, spec).types)
                except SelectionError as exc:
                    selected[spec] = set()
                    notices.append(f"scheme map {os.path.basename(path)}: torsions = {spec!r} matches no type ({exc})")
    by_type, reasons = {}, {}
    for t in _types(tset):
        scheme, why = default, "default of the map"
        for k, rule in enumerate(rules, start=1):
            if _matches(rule, t, bond_of.get(t), selected):
                scheme, why = rule["scheme"], f"rule {k} ({rule['text']})"
                break
        if isinstance(scheme, SchemeSet):
            scheme = scheme.parts[scheme.part_index(t)]
        if scheme == "auto":
            scheme, why = auto.by_type[t], f"{why}: auto: {auto.reasons[t]}"
        elif getattr(scheme, "name", None) == "cis-trans" and auto.by_type[t].name == "cis-trans-o":
            scheme, why = auto.by_type[t], f"{why}; measured through the carbonyl O, so near 0 is trans"
        by_type[t], reasons[t] = scheme, why
    return SchemeChoice(name=name, by_type=by_type, reasons=reasons, table=auto.table, notices=notices)


def _matches(rule, ttype, bond, selected):
    if "bond" in rule and bond not in rule["bond"]:
        return False
    if "types" in rule and not any(fnmatch.fnmatchcase(ttype, p) for p in rule["types"]):
        return False
    if "torsions" in rule and not any(ttype in selected[s] for s in rule["torsions"]):
        return False
    return True
