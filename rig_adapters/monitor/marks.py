"""The colour map and the marks that the live monitor and the offline report share.

One table, read by the monitor's server (which sends it to the page) and by
:mod:`rig_adapters.offline.report_figures`, so that a decoded position is the
same purple diamond and a posterior the same colour scale on the rig's screen
and in the report written afterwards.

Colours of the marks are from the Okabe & Ito (2008) colour-universal-design
palette; the colour map is cividis (Nuñez, Anderton & Renslow 2018, PLoS ONE
13:e0199239), perceptually uniform and readable with colour-vision deficiency.
Every mark has a shape as well as a colour.
"""

from __future__ import annotations

#: Name of the colour map of posteriors, occupancy and rate maps (a matplotlib name).
COLOUR_MAP = "cividis"

#: Ink of outlines and text.
INK = "#1d2126"

#: Bins outside the map (never visited, or outside the arena): light grey.
OUTSIDE_MAP = "#d9d5cc"

#: Each mark: fill colour, shape, matplotlib marker of that shape, legend text.
#: ``tracked`` is the tracker's position, ``decoded`` the most probable bin (MAP),
#: ``mean`` the posterior mean, ``true`` the simulation's true position (report only).
MARKS = {
    "tracked": {"colour": "#ffffff", "shape": "circle", "matplotlib": "o", "label": "tracked position (circle)"},
    "decoded": {"colour": "#cc79a7", "shape": "diamond", "matplotlib": "D",
                "label": "decoded, most probable bin (diamond)"},
    "mean": {"colour": "#e69f00", "shape": "cross", "matplotlib": "X", "label": "posterior mean (cross)"},
    "true": {"colour": "#56b4e9", "shape": "plus", "matplotlib": "P", "label": "true position, simulation (plus)"},
}

#: Colour of an event (the ring on the map, the arcs of heading zones).
EVENT_COLOUR = "#d55e00"

#: Decided replay content: the colour of each content rule, in the order of the config's ``[[rules]]``
#: of a "replay_" kind (Okabe & Ito 2008 colours; the word is always written beside them).
CONTENT_COLOURS = ("#009e73", "#0072b2", "#e69f00", "#cc79a7", "#56b4e9", "#f0e442")

#: A candidate event no content rule decided: grey, drawn hollow.
UNDECIDED_COLOUR = "#8a929c"


def content_colours(rule_names: list[str]) -> dict[str, str]:
    """The colour of each content rule's name (colours repeat after six rules)."""
    return {name: CONTENT_COLOURS[i % len(CONTENT_COLOURS)] for i, name in enumerate(rule_names)}


def colour_map_hex(levels: int = 256) -> list[str]:
    """The colour map sampled at ``levels`` evenly spaced points, as "rrggbb" strings (low to high)."""
    from matplotlib import colormaps

    cmap = colormaps[COLOUR_MAP].resampled(levels)
    return ["".join(f"{round(255 * c):02x}" for c in cmap(i)[:3]) for i in range(levels)]


def marks_payload(content_rules: list[str] | None = None) -> dict:
    """What the page needs to draw exactly the marks and colours the report draws.

    ``content_rules``: the names of the config's replay-content rules, in order, for their colours.
    """
    return {"colour_map": COLOUR_MAP, "colour_map_hex": colour_map_hex(), "ink": INK, "outside_map": OUTSIDE_MAP,
            "event": EVENT_COLOUR, "marks": MARKS, "content": content_colours(content_rules or []),
            "undecided": UNDECIDED_COLOUR}
