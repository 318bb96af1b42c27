"""The habit vocabulary and the per-habit facts, defined once.

Every module that names habits imports them from here: the classifier, the
statistics, the renderer of synthetic fields, the benchmarks and the report.
Adding a habit means adding it to :data:`HABITS` and to the tables below
(``tests/test_layout.py`` checks that every table covers every habit).

The names are the crystallographic terms of the design contract. The
growth-rate parameter is alpha = sqrt(3) v100 / v111 (the ratio of the
growth rates of the {100} and {111} faces); the kinetic Wulff shape is a
cube for alpha <= 1 and an octahedron for alpha >= 3, with cuboctahedra
between [1]_. The outline of a grain lying on a {100} face stays a square
up to alpha = 1.5, so the label ``cube`` covers alpha <= :data:`CUBE_ALPHA_MAX`
(what a micrograph can tell apart), while the solid is a true cube only at
alpha <= :data:`CUBE_SHAPE_ALPHA`.

References
----------
.. [1] Wulff construction with {100} and {111} faces, e.g. J. W. Mullin,
   *Crystallization*, 4th ed., Butterworth-Heinemann (2001), ch. 6
   (from memory).
"""

from __future__ import annotations

#: Habit vocabulary in the order of the design contract.
HABITS = ("cube", "cuboctahedron", "octahedron", "tabular_hexagon", "tabular_triangle", "rod", "irregular")

#: Habits of the {100}/{111} Wulff family (alpha is defined for them).
POLYHEDRAL_HABITS = ("cube", "cuboctahedron", "octahedron")

#: Habits that are flat twinned plates (their aspect ratio is meaningful).
TABULAR_HABITS = ("tabular_hexagon", "tabular_triangle")

#: alpha at and below which the Wulff solid is a cube (geometry).
CUBE_SHAPE_ALPHA = 1.0
#: alpha at and above which the Wulff solid is an octahedron (geometry).
OCTAHEDRON_ALPHA = 3.0
#: alpha at and below which a grain is labelled ``cube``: its outline on a
#: {100} face is a square for every alpha <= 1.5 (design contract).
CUBE_ALPHA_MAX = 1.5

#: A representative alpha of each polyhedral habit (synthetic fields, demos).
TYPICAL_ALPHA = {"cube": 1.0, "cuboctahedron": 2.0, "octahedron": 3.0}

#: Habit colours, chosen for this project: hues and lightness levels spread so
#: that every pair stays apart (CIEDE2000 >= 20) in normal vision and in
#: simulated protan, deutan and tritan vision (checked in tests/test_report.py).
HABIT_COLOURS = {
    "cube": "#1a2a6e",  # deep navy
    "cuboctahedron": "#a8eef0",  # pale cyan
    "octahedron": "#d9541a",  # vermilion
    "tabular_hexagon": "#a66ee8",  # lilac
    "tabular_triangle": "#f0e020",  # lemon
    "rod": "#5a1a1a",  # dark maroon
    "irregular": "#5a7878",  # slate
}
#: Line styles in the gallery, so habits differ by more than colour alone.
HABIT_LINES = {
    "cube": "-", "cuboctahedron": "-", "octahedron": "--", "tabular_hexagon": "-.",
    "tabular_triangle": ":", "rod": "--", "irregular": ":",
}
#: Plot markers, again so habits differ by more than colour.
HABIT_MARKERS = {
    "cube": "s", "cuboctahedron": "o", "octahedron": "D", "tabular_hexagon": "h",
    "tabular_triangle": "^", "rod": "|", "irregular": "x",
}


def habit_from_alpha(alpha: float) -> str:
    """Label of a polyhedral grain from its growth-rate parameter.

    Parameters
    ----------
    alpha : float
        sqrt(3) v100 / v111 (dimensionless).

    Returns
    -------
    str
        ``cube`` for alpha <= 1.5, ``octahedron`` for alpha >= 3,
        ``cuboctahedron`` between (design contract).
    """
    if alpha <= CUBE_ALPHA_MAX:
        return "cube"
    if alpha >= OCTAHEDRON_ALPHA:
        return "octahedron"
    return "cuboctahedron"
