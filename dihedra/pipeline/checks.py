"""Checks of the values of an analysis file, made before the first step runs.

Every value that an API call would refuse only after the earlier steps ran (a long tracking pass)
is checked here, with the API's own checks where they exist, and named with its table: numbers
that must be positive, whole or within a range (temperatures, time steps, frame steps, workers,
bootstrap resamples, bin widths, lags in frames or ps), names that must be known (schemes, energy units, Karplus
relations, figure formats and widths), and the input files a step reads whole (a scan, a table of
windows, measured couplings or populations, a weights file), which are read once to check them.
"""

from __future__ import annotations

from ..errors import DihedraError


def _positive(name, value):
    from ..trajectory.states import positive_number
    positive_number(name, value)


def _whole(minimum):
    def check(name, value):
        from ..trajectory.states import whole_number
        whole_number(name, value, minimum=minimum)
    return check


def _workers(name, value):
    """``workers``: ``"auto"`` (as many as pay) or a whole number of at least 1."""
    if value != "auto":
        from ..trajectory.states import whole_number
        try:
            whole_number(name, value, minimum=1)
        except DihedraError:
            raise DihedraError(f"{name} must be 'auto' or a whole number of at least 1; got {value!r}.") from None


def _temperature(name, value):
    from ..units import check_temperature
    if value is not None:
        check_temperature(value)


def _frame_bound(name, value):
    from ..trajectory.states import whole_number
    whole_number(name, value, minimum=-(2 ** 62))


def _bin_width(name, value):
    from ..analysis.profiles import check_bin_width
    check_bin_width(value, 1.0, name)


def _scheme(name, value):
    from ..selection.schemes import get_scheme
    get_scheme(value)


def _lags(name, value):
    values = value if isinstance(value, list) else [value]
    from ..trajectory.states import whole_number
    for v in values:
        whole_number("each lag (frames)", v)


def _lags_ps(name, value):
    import math
    for v in (value if isinstance(value, list) else [value]):
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) or v <= 0:
            raise DihedraError(f"each lag in lags_ps must be a positive number of ps; got {v!r}.")


def _relation(name, value):
    from ..analysis.couplings import get_relation
    for v in (value if isinstance(value, list) else [value]):
        get_relation(v)


def _formats(name, value):
    from ..errors import one_of
    from ..presentation.figures.figureset import FORMATS
    for f in (value.split(",") if isinstance(value, str) else value):
        one_of("figure format", str(f).strip().lower().lstrip("."), FORMATS)


def _width(name, value):
    from ..errors import one_of
    one_of("width", value, ("single", "double"))


def _energy_unit(name, value):
    from ..analysis.profiles import PROFILE_ENERGY_UNITS
    from ..units import canonical_energy_unit
    if canonical_energy_unit(value) not in PROFILE_ENERGY_UNITS:
        raise DihedraError(f"energy_unit must be kJ/mol, kcal/mol or kT for profiles; got {value!r}.")


#: Checks by key, for every table that has the key.
BY_KEY = {
    "temperature_k": _temperature, "profile_temperature_k": _temperature, "dt_ps": _positive,
    "step": _whole(1), "start": _frame_bound, "stop": _frame_bound, "workers": _workers,
    "chunk_frames": _whole(1), "n_state_blocks": _whole(1), "n_hist_blocks": _whole(1),
    "bin_width_deg": _bin_width, "pair_bin_width_deg": _bin_width, "bandwidth_deg": _positive,
    "max_mbar_samples": _whole(1), "scheme": _scheme, "lags": _lags, "lags_ps": _lags_ps, "relation": _relation,
    "formats": _formats, "width": _width, "tolerance_kj_mol": _positive,
}

#: Keys that a step checks by its own rule (the refit's bin width: any divisor of 360 up to 90 degrees).
OWN_CHECKS = {"refit": ("bin_width_deg",)}


def _refit_options(a):
    """The refit's own checks of its numbers, with the defaults of its signature for keys not given."""
    import inspect

    from ..analysis.refit import fit_torsion_correction
    from ..analysis.refit.driver import check_options
    defaults = inspect.signature(fit_torsion_correction).parameters
    check_options(**{k: a.get(k, defaults[k].default) for k in inspect.signature(check_options).parameters})


def check_values(name, arguments, where):
    """Check the values of step ``name`` (its arguments, paths already absolute); raise a
    :class:`DihedraError` naming the table (``where``)."""
    try:
        for key, value in arguments.items():
            check = BY_KEY.get(key) if key not in OWN_CHECKS.get(name, ()) else None
            if check is not None and value is not None:
                check(key, value)
        _check_step(name, arguments)
    except DihedraError as exc:
        raise DihedraError(f"{where}: {exc}") from None


def _check_step(name, a):
    """The checks that depend on the step: bootstrap resamples, energy units, input files."""
    if "n_bootstrap" in a:
        if name in ("profile", "compare", "windows"):   # the block bootstrap of profiles: 20 at least
            from ..analysis.profiles import check_estimate_options
            check_estimate_options(a["n_bootstrap"])
        elif name != "refit":   # (kinetics: 0 is no intervals; refit: below)
            _whole(0)("n_bootstrap", a["n_bootstrap"])
    if name == "refit":
        _refit_options(a)
    if name == "profile" and "energy_unit" in a:
        _energy_unit("energy_unit", a["energy_unit"])
    if name == "compare" and a.get("scan"):
        from ..analysis.scans import read_scan
        reading = {k: a.get(f"scan_{k}") for k in ("angle_unit", "energy_unit", "columns", "kind")}
        read_scan(a["scan"], temperature_k=a.get("temperature_k") or 300.0, **reading)
    if name == "compare" and a.get("reference_populations"):
        from ..analysis.reference_populations import read_reference_populations
        read_reference_populations(a["reference_populations"])
    if name == "couplings" and a.get("experimental"):
        from ..analysis.couplings import read_experimental
        read_experimental(a["experimental"])
    if name == "windows":
        from ..analysis.windows import read_windows
        read_windows(a["windows"])
    if name == "track" and a.get("weights") is not None:
        from ..trajectory.weights import load_weights
        load_weights(a["weights"], None)
