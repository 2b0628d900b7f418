"""The steps of an analysis file: each table of the file is one call of the Python API.

A step's keys are the keyword arguments of its API function (read from the function's signature,
so the file and the API cannot drift apart), less the ones the pipeline fills in itself (the
results folder, the tracking result, logging), plus a few that feed the inputs the function takes
as objects (a scan file for :func:`~dihedra.analysis.compare.compare_with_scan`, a file of measured
couplings for :func:`~dihedra.analysis.couplings.ensemble_couplings`). The target of
:func:`~dihedra.analysis.refit.fit_torsion_correction` is a path key (a file or a results folder).
"""

from __future__ import annotations

import inspect
import os
from dataclasses import dataclass, field

from ..analysis.compare import Thresholds, compare_with_scan
from ..analysis.couplings import coupling_file_names, ensemble_couplings, get_relation, read_experimental
from ..errors import DihedraError, OutputExistsError, name_list
from ..analysis.kinetics import state_kinetics
from ..analysis.profiles import free_energy_profiles
from ..analysis.ramachandran import ramachandran_regions
from ..analysis.reference_populations import compare_reference_populations
from ..analysis.refit import fit_torsion_correction
from ..analysis.scans import check_scan_output, mmff94_scan, molecule_from_topology, read_scan, write_scan_csv, xtb_scan
from ..analysis.windows import unbias_windows
from ..io.tables import read_optional_json, read_optional_table
from ..presentation.figures import write_figures
from ..presentation.report import write_report
from ..tracking import track


@dataclass(frozen=True)
class StepDef:
    """One kind of step: its API call, the keys of its table and which of them are paths."""

    name: str
    call: str                       # the API function, as the record and --dry-run show it
    run: object                     # run(context, arguments) -> a line saying what was done
    keys: tuple                     # the valid keys of the table
    paths: frozenset = frozenset()  # keys whose values are paths (relative to the file)
    specs: frozenset = frozenset()  # keys whose strings are paths only when they name a .toml file
    required: tuple = ()
    creates_folder: bool = False    # the step makes the results folder (out of the file's 'out')
    defaults: dict = field(default_factory=dict)


def keyword_names(func, drop=()):
    """The parameters of ``func`` that a table may set (everything but ``drop``)."""
    kinds = (inspect.Parameter.POSITIONAL_OR_KEYWORD, inspect.Parameter.KEYWORD_ONLY)
    return tuple(name for name, p in inspect.signature(func).parameters.items()
                 if p.kind in kinds and name not in drop)


def signature_defaults(*funcs):
    """Default values of the parameters of ``funcs`` (for the type checks of a table)."""
    out = {}
    for func in funcs:
        for name, p in inspect.signature(func).parameters.items():
            if p.default is not inspect.Parameter.empty:
                out.setdefault(name, p.default)
    return out


# ----------------------------------------------------------------------------------------------
# What each step does
# ----------------------------------------------------------------------------------------------

def _track(ctx, a):
    res = track(a.pop("topology"), a.pop("trajectories"), out=ctx.out, overwrite=ctx.overwrite, log=ctx.log, **a)
    return f"{len(res.torsions)} torsions, {res.summary['n_frames_analysed']} frames -> {res.folder}" + _noted(res)


def _windows(ctx, a):
    res = unbias_windows(a.pop("windows"), log=ctx.log, **a)
    res.save(ctx.out, overwrite=ctx.overwrite)
    if not res.info["restraints_consistent"]:   # (the later steps would rest on an unusable profile)
        raise DihedraError(f"the samples contradict the window table (see the WARNING); the results in {ctx.out} "
                           "are unusable until the table is fixed, and no later step runs.")
    return f"{len(res.windows)} windows -> {ctx.out}" + _noted(res)


def _scan(ctx, a):
    out = check_scan_output(a.pop("out"), overwrite=a.pop("overwrite", False),
                            inputs=[a["topology"], a.get("trajectory")])
    mol, local = molecule_from_topology(a["topology"], a["torsion"], a.get("trajectory"))
    method = a["method"]
    step = a.get("step_deg", 10.0 if method == "mmff94" else 30.0)
    if method == "mmff94":
        scan = mmff94_scan(mol, local, step_deg=step)
    else:
        scan = xtb_scan(mol, local, step_deg=step, charge=a.get("charge", 0), unpaired=a.get("unpaired", 0))
    write_scan_csv(scan, out, extra={"topology": os.path.abspath(a["topology"]), "torsion_atoms": a["torsion"]},
                   overwrite=True)
    return f"{len(scan.angle_deg)} points -> {out}"


#: The files each analysis step writes (names, or prefixes ending in "_" or "/"): replaced only
#: with ``dihedra run --overwrite`` when the folder had them before the run.
OUTPUTS = {
    "profile": ("profiles.csv", "minima.csv", "barriers.csv", "state_free_energies.csv", "profiles_2d.csv",
                "profiles.json"),
    "compare": ("comparison.csv", "comparison_profiles.csv", "comparison.json"),
    "kinetics": ("transitions.csv", "lifetimes.csv", "dwell_times.csv", "dwell_survival.csv", "timescales.csv",
                 "mfpt.csv", "kinetics.json"),
    "ramachandran": ("ramachandran.csv", "ramachandran_by_type.csv", "ramachandran.json"),
    "refit": ("refit_", "refit."),
    "figures": ("figures/",),
}


def _check(ctx, step, names=None):
    """Stop before a step replaces outputs that the folder held before this run (unless --overwrite)."""
    listed = OUTPUTS.get(step, ()) if names is None else names
    found = [f for f in ctx.before if f in listed or any(f.startswith(p) for p in listed if p.endswith(("_", "/", ".")))]
    if found and not ctx.overwrite:
        shown = name_list(sorted(found), 4)
        raise OutputExistsError(f"{ctx.out} already has {shown} from an earlier run; run the analysis file with "
                                "--overwrite to replace them (only those files).")


def _profile(ctx, a):
    _check(ctx, "profile")
    unit = a.pop("energy_unit", "kJ/mol")
    res = free_energy_profiles(ctx.result(), log=ctx.log, **a)
    paths = res.save(ctx.out, energy_unit=unit)
    return _written(paths) + _noted(res)


def _compare(ctx, a):
    _check(ctx, "compare")
    result = ctx.result()
    reference = a.pop("reference_populations", None)
    scan_path = a.pop("scan", None)
    reading = {k: a.pop(f"scan_{k}", None) for k in ("angle_unit", "energy_unit", "columns", "kind")}
    tolerance = a.pop("tolerance_kj_mol", None)
    ref = compare_reference_populations(result, reference) if reference else None
    if scan_path is None:
        return _written(ref.save(ctx.out)) + _noted(ref)
    temperature = a.get("temperature_k") or result.summary.get("temperature_k")
    scan = read_scan(scan_path, temperature_k=temperature, **reading)
    if tolerance is not None:
        a["thresholds"] = Thresholds(tolerance_kj_mol=float(tolerance))
    cmp = compare_with_scan(result, scan, log=ctx.log, **a)
    if ref is not None:
        cmp.add_reference(ref)
    return _written(cmp.save(ctx.out)) + _noted(cmp)


def _kinetics(ctx, a):
    _check(ctx, "kinetics")
    barriers = read_optional_table(ctx.out, "barriers.csv")
    info = read_optional_json(ctx.out, "profiles.json") or {}
    res = state_kinetics(ctx.result(), barriers=barriers, profile_temperature_k=info.get("temperature_k"),
                         log=ctx.log, **a)
    return _written(res.save(ctx.out)) + _noted(res)


def _couplings(ctx, a):
    relations = a.pop("relation")
    relations = [get_relation(r) for r in ([relations] if isinstance(relations, str) else relations)]
    _check(ctx, "couplings", [n for r in relations for n in coupling_file_names(r.name, True)])
    path = a.pop("experimental", None)
    experimental = read_experimental(path) if path else None
    res = ensemble_couplings(ctx.result(), relations, experimental=experimental, **a)
    return _written(res.save(ctx.out, experimental_path=path)) + _noted(res)


def _ramachandran(ctx, a):
    _check(ctx, "ramachandran")
    res = ramachandran_regions(ctx.result(), **a)
    return _written(res.save(ctx.out)) + _noted(res)


def _refit(ctx, a):
    _check(ctx, "refit")
    res = fit_torsion_correction(ctx.result(), a.pop("target"), log=ctx.log, **a)
    return _written(res.save(ctx.out)) + _noted(res)


def _figures(ctx, a):
    _check(ctx, "figures")
    paths, skipped = write_figures(ctx.out, log=ctx.log, overwrite=ctx.overwrite, **a)
    return f"{len(paths)} figure file(s)" + (f", {len(skipped)} figure(s) without data" if skipped else "")


def _report(ctx, a):
    return f"-> {write_report(ctx.out, log=ctx.log, **a)}"


def _written(paths):
    return "wrote " + ", ".join(os.path.basename(p) for p in paths)


def _noted(res):
    """``; N notice(s) ...`` for a step's result with notices (they are in its files and the
    report, and the step's own command prints them): a pipeline's summary line says they exist."""
    n = len(getattr(res, "notices", None) or [])
    return f"; {n} notice(s), in its .json file and the report" if n else ""


# ----------------------------------------------------------------------------------------------
# The steps
# ----------------------------------------------------------------------------------------------

_PIPELINE_OWNED = ("out", "overwrite", "log", "progress")

STEPS = {s.name: s for s in [
    StepDef("scan", "dihedra.analysis.scans.mmff94_scan / xtb_scan + write_scan_csv", _scan,
            ("topology", "trajectory", "torsion", "method", "out", "overwrite", "step_deg", "charge", "unpaired"),
            paths=frozenset({"topology", "trajectory", "out"}), required=("topology", "torsion", "method", "out"),
            defaults={"trajectory": None, "overwrite": False, "step_deg": 10.0, "charge": 0, "unpaired": 0}),
    StepDef("track", "dihedra.track", _track, keyword_names(track, _PIPELINE_OWNED),
            paths=frozenset({"topology", "trajectories", "weights"}), specs=frozenset({"torsions", "scheme"}),
            required=("topology", "trajectories"), creates_folder=True, defaults=signature_defaults(track)),
    StepDef("windows", "dihedra.unbias_windows", _windows, keyword_names(unbias_windows, _PIPELINE_OWNED),
            paths=frozenset({"windows"}), specs=frozenset({"scheme"}), required=("windows", "temperature_k"),
            creates_folder=True, defaults=signature_defaults(unbias_windows)),
    StepDef("profile", "dihedra.free_energy_profiles", _profile,
            keyword_names(free_energy_profiles, ("result",) + _PIPELINE_OWNED) + ("energy_unit",),
            defaults=signature_defaults(free_energy_profiles)),
    StepDef("compare", "dihedra.compare_with_scan", _compare,
            keyword_names(compare_with_scan, ("result", "scan", "thresholds") + _PIPELINE_OWNED)
            + ("scan", "scan_angle_unit", "scan_energy_unit", "scan_columns", "scan_kind", "tolerance_kj_mol",
               "reference_populations"),
            paths=frozenset({"scan", "reference_populations"}), defaults=signature_defaults(compare_with_scan)),
    StepDef("couplings", "dihedra.ensemble_couplings", _couplings, ("relation", "types", "select", "experimental"),
            paths=frozenset({"experimental"}), specs=frozenset({"relation"}), required=("relation",)),
    StepDef("kinetics", "dihedra.state_kinetics", _kinetics,
            keyword_names(state_kinetics, ("result", "barriers", "profile_temperature_k") + _PIPELINE_OWNED),
            defaults=signature_defaults(state_kinetics)),
    StepDef("ramachandran", "dihedra.ramachandran_regions", _ramachandran,
            keyword_names(ramachandran_regions, ("result",) + _PIPELINE_OWNED),
            defaults=signature_defaults(ramachandran_regions)),
    StepDef("refit", "dihedra.fit_torsion_correction", _refit,
            keyword_names(fit_torsion_correction, ("result", "universe") + _PIPELINE_OWNED),
            paths=frozenset({"target"}), specs=frozenset({"relation"}), required=("target",),
            defaults=signature_defaults(fit_torsion_correction)),
    StepDef("figures", "dihedra.presentation.figures.write_figures", _figures,
            keyword_names(write_figures, ("folder", "out_dir") + _PIPELINE_OWNED),
            defaults=signature_defaults(write_figures)),
    StepDef("report", "dihedra.presentation.report.write_report", _report,
            keyword_names(write_report, ("folder",) + _PIPELINE_OWNED[2:]),
            paths=frozenset({"out"}), defaults=signature_defaults(write_report)),
]}

#: Order in which tables run when the file gives no ``steps``.
STEP_ORDER = tuple(STEPS)
