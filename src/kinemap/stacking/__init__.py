"""Stacking: spectra shifted by a velocity field onto a common axis, averaged per bin and
fitted with Gaussians (``stack_spectra`` / ``StackedSpectra`` in :mod:`.stage`)."""
