"""Reading spectral-line cubes: axes, units, velocity conventions, frames, beams, subsets."""
from .core import Cube, CubeMeta
from .reader import read_cube
from .spectral import CONVENTIONS, axis_kind, from_velocity, to_velocity
from ._blocks import block_rows, map_blocks, read_rows
from .maps import SkyMap, is_2d_image, read_map

__all__ = ["Cube", "CubeMeta", "read_cube", "CONVENTIONS", "axis_kind", "to_velocity",
           "from_velocity", "map_blocks", "read_rows", "block_rows", "SkyMap", "read_map", "is_2d_image"]
