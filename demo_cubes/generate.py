#!/usr/bin/env python
"""Write the invented demo cubes and their truth files.

    python demo_cubes/generate.py [--out DIR] [--seed N] [--overwrite] [--full-arrays]

A thin wrapper around :func:`kinemap.datasets.generate.write_demo_cubes`; see demo_cubes/README.md.
"""
from __future__ import annotations

import argparse
import sys
from pathlib import Path

from kinemap.datasets.generate import write_demo_cubes
from kinemap.errors import KinemapError


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(
        description="Write the invented demo cubes (HI disk galaxy, H-alpha nebula) and "
                    "their truth JSON files.")
    parser.add_argument("--out", type=Path, default=Path(__file__).resolve().parent,
                        help="output folder (default: the demo_cubes folder)")
    parser.add_argument("--seed", type=int, default=None,
                        help="noise seed: galaxy uses SEED, nebula SEED + 1 "
                             "(default: the generator's defaults, 1 and 2)")
    parser.add_argument("--overwrite", action="store_true",
                        help="replace existing files")
    parser.add_argument("--full-arrays", action="store_true",
                        help="list the 2D truth maps in full in the JSON files")
    args = parser.parse_args(argv)
    try:
        paths = write_demo_cubes(args.out, seed=args.seed, overwrite=args.overwrite,
                                 full_arrays=args.full_arrays)
    except KinemapError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    for name, path in paths.items():
        print(f"{name}: {path}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
