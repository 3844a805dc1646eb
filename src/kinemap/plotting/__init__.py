"""Figures of every stage, one module per stage.

Plotting takes result objects only (duck-typed: it imports no stage), never the cube or
the run state, and draws with matplotlib's object-oriented API (no pyplot state), so the
figures can be made on any thread.  :func:`figures_for` is what the writer calls.
"""
from __future__ import annotations

__all__ = ["figures_for"]


def figures_for(result) -> dict:
    """``{name: (Figure, description)}`` of the stage figures of ``result`` (maps of single
    products are drawn by :func:`kinemap.plotting.maps.plot_map` as they are written)."""
    name = getattr(result, "name", "")
    if name == "fit":
        from kinemap.plotting.linefit import figures
    elif name == "rings":
        from kinemap.plotting.rings import figures
    elif name == "rings3d":
        from kinemap.plotting.rings3d import figures
    elif name == "widths":
        from kinemap.plotting.widths import figures
    elif name == "turbulence":
        from kinemap.plotting.turbulence import figures
    elif name in ("spectrum", "pv"):
        from kinemap.plotting.extract import figures
    elif name == "channels":
        from kinemap.plotting.channels import figures
    elif name == "stack":
        from kinemap.plotting.stacking import figures
    else:
        return {}
    return figures(result)
