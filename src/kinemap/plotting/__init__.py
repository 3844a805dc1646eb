"""Figures of every stage, one module per stage.  Plotting takes result objects only; it
never reads the cube or the run state."""
