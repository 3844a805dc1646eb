"""Invented demo scenarios: seeded generators of demo cubes and ``kinemap demo``.

``demo_cube('galaxy_hi')`` and ``demo_cube('nebula_halpha')`` give the paths of the demo
cubes (generated into a cache folder on first use); ``load_truth(path)`` the values they
were made with.
"""
from kinemap.datasets.cache import demo_cube, demo_cube_dir, demo_cubes, load_truth

__all__ = ["demo_cube", "demo_cubes", "demo_cube_dir", "load_truth"]
