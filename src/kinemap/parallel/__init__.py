"""Walking a cube in blocks of whole spectra, in this process or on a dask cluster."""
from kinemap.parallel.blocks import block_rows, map_blocks, read_rows

__all__ = ["map_blocks", "read_rows", "block_rows"]
