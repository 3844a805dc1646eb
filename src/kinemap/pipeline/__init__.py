"""Config-driven runs: the schema (the one source of defaults), the runner that wires
the stages, and the adapters from config sections to the stages' keyword arguments."""
