"""Input and output: reading cubes and maps (header repair, subsets, beams) and writing
products (FITS maps with WCS and provenance, ECSV tables, manifest.json, HTML summary).

Only this subpackage touches files.  Reading is :func:`read_cube` / :func:`read_map`;
writing is :func:`write_products` into a :class:`StagedOutput` folder.
"""
from kinemap.io.cube import Cube, CubeMeta
from kinemap.io.maps import SkyMap, is_2d_image, read_map
from kinemap.io.outdir import StagedOutput, check_output_dir
from kinemap.io.products import Product
from kinemap.io.reader import read_cube

__all__ = ["Cube", "CubeMeta", "read_cube", "SkyMap", "read_map", "is_2d_image", "Product",
           "StagedOutput", "check_output_dir"]
