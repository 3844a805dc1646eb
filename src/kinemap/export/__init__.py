"""Writing products: FITS maps and cubes, ECSV tables, PNG plots, manifest.json, HTML."""
from .outdir import StagedOutput, check_output_dir
from .writer import write_products

__all__ = ["StagedOutput", "check_output_dir", "write_products"]
