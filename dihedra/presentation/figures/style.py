r"""The look of dihedra figures: colours, journal widths, matplotlib settings and file metadata.

Colours
-------
One colour per state in every figure, a fixed mapping per built-in scheme, taken from the
colour-blind-safe palette of Okabe & Ito (2008) (distinguishable under the common forms of colour
vision deficiency, Wong, Nat. Methods 8 (2011) 441). States that play the same part share a hue
across schemes, so a figure reads the same whichever scheme made it:

=====================================  ==============  ==========
state                                  colour          hex
=====================================  ==============  ==========
anti, ap, staggered, trans, t, 180     blue            #0072B2
gauche+, +sc, g+, +90, 90/-90          orange          #E69F00
gauche-, -sc, g-, -90                  reddish purple  #CC79A7
eclipsed, sp, cis, 0                   vermillion      #D55E00
+ac                                    sky blue        #56B4E9
-ac                                    bluish green    #009E73
0/180, rotor                           blue            #0072B2
syn (nucleotide chi)                   vermillion      #D55E00
C2'-endo (delta)                       blue            #0072B2
C3'-endo (delta)                       orange          #E69F00
atypical (delta)                       bluish green    #009E73
endo (proline chi1, chi2)              sky blue        #56B4E9
exo (proline chi1, chi2)               bluish green    #009E73
=====================================  ==============  ==========

The protein schemes (``cis-trans``, the rotamer wells of ``chi-rotamers``, and ``protein``, a set
of schemes) follow the same roles: the extended well (anti, trans, t, 180) is blue, the wells at
+60 or +90 orange, at -60 or -90 reddish purple, the eclipsed or cis well vermillion. Within one
torsion type every state has its own colour; across the parts of a set a colour means one role,
and legends that show several types name every state of a colour (``anti / trans``).

A scheme whose states all carry names of the built-in schemes (the sampled basins of ``--scheme
basins``, named ap, +sc, -sc, ...) takes their colours when they stay distinct; any other
custom scheme (TOML) takes :data:`CYCLIC_PALETTE` in the order of its state labels (blue,
orange, reddish purple, bluish green, vermillion, sky blue, yellow; it repeats after seven
states). Undefined frames are light grey (:data:`UNDEFINED_COLOUR`).

Style
-----
:func:`style` is a context manager with the look of dihedra figures: 8-point DejaVu Sans (shipped
with matplotlib), open axes (no top and right spines), ticks outside, thin lines, a slate ink
colour; PDF and PostScript embed TrueType fonts (``pdf.fonttype = 42``), PNG files are 300 dpi, and
figures are made at journal widths (:data:`SINGLE_COLUMN_IN` = 3.35 in, :data:`DOUBLE_COLUMN_IN`
= 7 in) with constrained layout (never ``bbox_inches="tight"``, which would change the width).

References
----------
M. Okabe & K. Ito, Color Universal Design (CUD): how to make figures and presentations that are
friendly to colorblind people (2008), https://jfly.uni-koeln.de/color/. B. Wong, Points of view:
color blindness, Nat. Methods 8 (2011) 441.
"""

from __future__ import annotations

import contextlib

import numpy as np

from ...errors import one_of

#: Okabe-Ito colours (Okabe & Ito 2008) by name.
OKABE_ITO = {
    "blue": "#0072B2", "orange": "#E69F00", "reddish purple": "#CC79A7", "bluish green": "#009E73",
    "vermillion": "#D55E00", "sky blue": "#56B4E9", "yellow": "#F0E442", "black": "#000000",
}

#: Fixed state colours of the built-in schemes (label -> hex).
STATE_COLOURS = {
    "anti-gauche": {"anti": OKABE_ITO["blue"], "gauche+": OKABE_ITO["orange"],
                    "gauche-": OKABE_ITO["reddish purple"]},
    "staggered-eclipsed": {"staggered": OKABE_ITO["blue"], "eclipsed": OKABE_ITO["vermillion"]},
    "klyne-prelog": {"sp": OKABE_ITO["vermillion"], "+sc": OKABE_ITO["orange"], "+ac": OKABE_ITO["sky blue"],
                     "ap": OKABE_ITO["blue"], "-ac": OKABE_ITO["bluish green"],
                     "-sc": OKABE_ITO["reddish purple"]},
    "cis-trans": {"trans": OKABE_ITO["blue"], "cis": OKABE_ITO["vermillion"]},
    "cis-trans-o": {"trans": OKABE_ITO["blue"], "cis": OKABE_ITO["vermillion"]},
    "chi-sp3": {"g+": OKABE_ITO["orange"], "t": OKABE_ITO["blue"], "g-": OKABE_ITO["reddish purple"]},
    "gauche-trans": {"g+": OKABE_ITO["orange"], "t": OKABE_ITO["blue"], "g-": OKABE_ITO["reddish purple"]},
    "chi-sp2": {"0": OKABE_ITO["vermillion"], "+90": OKABE_ITO["orange"], "180": OKABE_ITO["blue"],
                "-90": OKABE_ITO["reddish purple"]},
    "chi-sp2-symmetric": {"0/180": OKABE_ITO["blue"], "90/-90": OKABE_ITO["orange"]},
    "coplanar-perpendicular": {"0/180": OKABE_ITO["blue"], "90/-90": OKABE_ITO["orange"]},
    "symmetric-rotor": {"rotor": OKABE_ITO["blue"]},
    "syn-anti": {"anti": OKABE_ITO["blue"], "syn": OKABE_ITO["vermillion"]},
    "sugar-pucker": {"C2'-endo": OKABE_ITO["blue"], "C3'-endo": OKABE_ITO["orange"],
                     "atypical": OKABE_ITO["bluish green"]},
    "proline-chi1": {"endo": OKABE_ITO["sky blue"], "exo": OKABE_ITO["bluish green"]},
    "proline-chi2": {"endo": OKABE_ITO["sky blue"], "exo": OKABE_ITO["bluish green"]},
}

#: Colours of custom schemes, in the order of their state labels (repeats after seven states).
CYCLIC_PALETTE = tuple(OKABE_ITO[k] for k in ("blue", "orange", "reddish purple", "bluish green",
                                                "vermillion", "sky blue", "yellow"))

#: Colour of undefined frames (-1) in state figures.
UNDEFINED_COLOUR = "#D9D9D9"
#: Colour of unsampled cells of 2-D maps.
UNSAMPLED_COLOUR = "#E4E7EA"
#: Ink of text, axes and neutral lines.
INK = "#22303C"
#: Neutral mid grey for secondary elements.
NEUTRAL = "#7A8691"

#: Journal widths in inches.
SINGLE_COLUMN_IN = 3.35
DOUBLE_COLUMN_IN = 7.0
WIDTHS = {"single": SINGLE_COLUMN_IN, "double": DOUBLE_COLUMN_IN}
#: File formats of ``dihedra figures``.
FORMATS = ("pdf", "png", "svg")

#: Axis labels (mathtext); units after a slash, as in IUPAC quantity calculus.
ANGLE_LABEL = r"$\varphi$ / deg"
POPULATION_LABEL = "population (fraction)"
ENERGY_UNIT_LABELS = {"kj_mol": r"kJ mol$^{-1}$", "kcal_mol": r"kcal mol$^{-1}$", "kt": r"$k_\mathrm{B}T$"}

#: Alpha of the state-sector bands behind curves.
SECTOR_ALPHA = 0.16

_RC = {
    "font.family": "sans-serif",
    "font.sans-serif": ["DejaVu Sans"],
    "font.size": 8.0,
    "axes.titlesize": 8.0,
    "axes.labelsize": 8.0,
    "xtick.labelsize": 7.0,
    "ytick.labelsize": 7.0,
    "legend.fontsize": 6.5,
    "legend.frameon": False,
    "legend.handlelength": 1.4,
    "legend.borderaxespad": 0.3,
    "mathtext.default": "regular",
    "text.color": INK,
    "axes.labelcolor": INK,
    "axes.edgecolor": INK,
    "axes.linewidth": 0.6,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.titlelocation": "left",
    "axes.titlepad": 3.0,
    "xtick.color": INK,
    "ytick.color": INK,
    "xtick.direction": "out",
    "ytick.direction": "out",
    "xtick.major.size": 2.5,
    "ytick.major.size": 2.5,
    "xtick.major.width": 0.6,
    "ytick.major.width": 0.6,
    "xtick.minor.size": 1.5,
    "ytick.minor.size": 1.5,
    "lines.linewidth": 1.1,
    "patch.linewidth": 0.5,
    "hatch.linewidth": 0.6,
    "errorbar.capsize": 1.5,
    "figure.dpi": 100,
    "figure.facecolor": "white",
    "savefig.dpi": 300,
    "savefig.facecolor": "white",
    "pdf.fonttype": 42,
    "ps.fonttype": 42,
    "svg.fonttype": "path",
    "svg.hashsalt": "dihedra",
    "image.interpolation": "nearest",
}


@contextlib.contextmanager
def style():
    """Context manager: draw and save figures in the dihedra look (see the module notes)."""
    import matplotlib

    with matplotlib.rc_context(_RC):
        yield


def state_colours(scheme):
    """Colour of every state of ``scheme``: dict label -> hex colour.

    Built-in schemes (also ``staggered-eclipsed:N``) have a fixed mapping (:data:`STATE_COLOURS`);
    any other scheme takes :data:`CYCLIC_PALETTE` in the order of its labels. A set of schemes
    (``protein``, ``chi-rotamers``) colours each part by its own mapping.
    """
    parts = getattr(scheme, "parts", None)
    if parts or getattr(scheme, "partial", False):
        # a set of schemes, or one part of it in the codes of the set (labels: all of the set's)
        out = {}
        for part in parts or ():
            for label, colour in state_colours(part).items():
                out.setdefault(label, colour)
        if not parts:   # one part: its own mapping first, the other built-in labels as in their schemes
            for fixed in [STATE_COLOURS.get(scheme.name, {})] + list(STATE_COLOURS.values()):
                for label, colour in fixed.items():
                    out.setdefault(label, colour)
        rest = [label for label in scheme.labels if label not in out]
        out.update({label: CYCLIC_PALETTE[k % len(CYCLIC_PALETTE)] for k, label in enumerate(rest)})
        return {label: out[label] for label in scheme.labels}
    labels = list(scheme.labels)
    for fixed in STATE_COLOURS.values():
        if set(labels) == set(fixed):
            return {label: fixed[label] for label in labels}
    known = {}
    for fixed in STATE_COLOURS.values():
        for label, colour in fixed.items():
            known.setdefault(label, colour)
    if all(label in known for label in labels) and len({known[x] for x in labels}) == len(labels):
        return {label: known[label] for label in labels}   # e.g. basins named ap, +sc, -sc
    return {label: CYCLIC_PALETTE[k % len(CYCLIC_PALETTE)] for k, label in enumerate(labels)}


def colour_groups(scheme, states):
    """The ``states`` grouped by their colour, for one legend over several torsion types:
    list of ``(colour, [labels])`` in the order the states first appear."""
    return group_by_colour(state_colours(scheme), states)


def group_by_colour(colours, labels):
    """``labels`` grouped by their colour in ``colours`` (label -> colour): list of
    ``(colour, [labels])`` in the order the labels first appear."""
    groups = {}
    for s in labels:
        groups.setdefault(colours[s], []).append(s)
    return list(groups.items())


def _darker(colour, amount=0.35):
    """A colour mixed towards the ink (for text in a state colour)."""
    from matplotlib.colors import to_rgb

    c, k = np.array(to_rgb(colour)), np.array(to_rgb(INK))
    return tuple((1 - amount) * c + amount * k)


def _width_in(width):
    if isinstance(width, str):
        one_of("figure width", width, tuple(WIDTHS))
        return WIDTHS[width]
    return float(width)


def _metadata(fmt):
    from ..._version import __version__
    creator = f"dihedra {__version__}"
    if fmt == "png":
        return {"Software": creator}
    if fmt == "pdf":
        return {"Creator": creator}
    if fmt == "svg":
        return {"Creator": creator}
    return None
