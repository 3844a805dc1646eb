"""Invented demo scenarios: seeded generators of demo cubes and ``kinemap demo``."""
