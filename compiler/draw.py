"""A drawing of a scheme: states, transitions and their rate labels.

Layout: a composed scheme (see :mod:`.compose`) is drawn as a projection of
its product — every part gets a direction, and a state sits at the sum of
its parts' offsets, so two-state parts give the familiar hypercube picture;
any other scheme gets networkx's Kamada–Kawai layout (a spring layout above
200 states). Reversible pairs are drawn as two arcs bowing apart, one-way
edges as a dashed red arc, so energy-driven steps stand out. On request a
spanning tree (breadth-first, of the undirected skeleton) or the basis cycles
are highlighted. Rate labels are written at the arcs' midpoints when there
are at most 40 edges (``labels="auto"``).

Written through :mod:`treeflux.runtime.safe_io` (temporary file, rename).
"""

from __future__ import annotations

import math
from pathlib import Path

from treeflux.runtime import graph

from .errors import ModelError

__all__ = ["draw", "check_format", "FORMATS"]

FORMATS = (".png", ".svg")
MAX_DRAWN_STATES = 2000


def check_format(path) -> None:
    """Refuse an output name whose format is not drawn (before any work)."""
    from treeflux.runtime.safe_io import check_target

    suffix = Path(path).suffix.lower()
    if suffix not in FORMATS:
        raise ModelError(f"cannot draw to {path}: use a .png or .svg file name")
    check_target(path)


def _positions(scheme):
    import networkx as nx

    comp = getattr(scheme, "composition", None)
    states = scheme.states
    if comp:
        parts = comp["parts"]
        k = len(parts)
        pos = {}
        for combo, name in comp["names"].items():
            x = y = 0.0
            for j, (part, label) in enumerate(zip(parts, combo)):
                angle = math.pi * j / max(k, 1)
                length = 1.0 + 0.35 * j
                step = part.states.index(label)
                x += step * length * math.cos(angle)
                y += step * length * math.sin(angle)
            pos[name] = (x, y)
        return pos
    g = nx.Graph()
    g.add_nodes_from(states)
    g.add_edges_from((e.source, e.target) for e in scheme.edges)
    if len(states) <= 200:
        return nx.kamada_kawai_layout(g)
    return nx.spring_layout(g, seed=1)


def _highlighted(scheme, mode):
    states = scheme.states
    index = scheme.index()
    edges = [(index[e.source], index[e.target]) for e in scheme.edges]
    marked = set()
    if mode == "tree":
        tree = graph.breadth_first_parents(len(states), edges)
        for v, a in enumerate(tree.parent):
            if a >= 0:
                marked.add(frozenset((states[a], states[v])))
    elif mode == "cycles":
        for cycle, _chord in graph.fundamental_cycles(len(states), edges):
            for a, b in zip(cycle, cycle[1:] + cycle[:1]):
                marked.add(frozenset((states[a], states[b])))
    return marked


def draw(scheme, path, *, highlight: str = "none", labels: str = "auto"):
    """Draw ``scheme`` to ``path`` (.png or .svg); returns the path."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.patches import FancyArrowPatch

    from treeflux.runtime.safe_io import output_path

    check_format(path)
    scheme.validate()
    n = len(scheme.states)
    if n > MAX_DRAWN_STATES:
        raise ModelError(f"{scheme.origin}: {n:,} states are too many to draw readably "
                         f"(limit {MAX_DRAWN_STATES:,})")
    pos = _positions(scheme)
    marked = _highlighted(scheme, highlight)
    present = {(e.source, e.target) for e in scheme.edges}
    show_labels = labels == "all" or (labels == "auto" and len(scheme.edges) <= 40)
    size = min(16.0, max(6.0, 0.9 * math.sqrt(n) * 2))
    fig, ax = plt.subplots(figsize=(size, size * 0.8))
    node_size = 900 if n <= 40 else 300
    shrink = math.sqrt(node_size) / 2 + 2  # points: stop arrows at the node's rim
    for e in scheme.edges:
        (x1, y1), (x2, y2) = pos[e.source], pos[e.target]
        one_way = (e.target, e.source) not in present
        hot = frozenset((e.source, e.target)) in marked
        color = "#c0392b" if one_way else ("#1f6fb2" if hot else "#555555")
        arrow = FancyArrowPatch((x1, y1), (x2, y2), arrowstyle="-|>", mutation_scale=11,
                                connectionstyle="arc3,rad=0.12", linestyle="--" if one_way else "-",
                                linewidth=2.4 if hot else 1.0, color=color,
                                shrinkA=shrink, shrinkB=shrink, zorder=1)
        ax.add_patch(arrow)
        if show_labels:
            mx, my = (x1 + x2) / 2, (y1 + y2) / 2
            dx, dy = x2 - x1, y2 - y1
            norm = math.hypot(dx, dy) or 1.0
            off = 0.11 * norm
            ax.text(mx - dy / norm * off, my + dx / norm * off, e.rate, fontsize=7, color=color,
                    ha="center", va="center", zorder=3,
                    bbox=dict(boxstyle="round,pad=0.1", fc="white", ec="none", alpha=0.8))
    for name, (x, y) in pos.items():
        ax.scatter([x], [y], s=node_size, color="#f4f1e8", edgecolors="#333333", zorder=2)
        ax.text(x, y, name, fontsize=9 if n <= 40 else 6, ha="center", va="center", zorder=4)
    ax.set_aspect("equal")
    ax.margins(0.12)
    ax.axis("off")
    legend = "solid: reversible pair; dashed red: one-way transition"
    if highlight != "none":
        legend += f"; thick blue: {'spanning tree' if highlight == 'tree' else 'basis cycles'}"
    ax.set_title(f"{scheme.name}: {n} states, {len(scheme.edges)} transitions\n{legend}", fontsize=10)
    with output_path(path) as tmp:
        fig.savefig(tmp, dpi=110, bbox_inches="tight")
    plt.close(fig)
    return Path(path)
