"""Errors and warnings raised by kinemap.

Every error a user can cause by giving bad input is a :class:`KinemapError` whose message
names the problem and the fix in one line; the command-line tool prints that line and
exits with code 2.  Warnings derive from :class:`KinemapWarning` so they can be filtered
as a family or one kind at a time.
"""

__all__ = [
    "KinemapError",
    "KinemapWarning",
    "HeaderRepairWarning",
    "HeaderWarning",
    "MissingUnitWarning",
    "BeamWarning",
    "NoiseWarning",
    "FitWarning",
    "OutputWarning",
    "ProductWarning",
]


class KinemapError(Exception):
    """Bad input or an impossible request; the message says what is wrong and how to fix it."""


class KinemapWarning(UserWarning):
    """Base class of every warning kinemap emits."""


class HeaderRepairWarning(KinemapWarning):
    """astropy/wcslib changed the header on reading (the original is kept and reported)."""


class HeaderWarning(KinemapWarning):
    """The header is usable but something in it looks wrong (a value to check)."""


class MissingUnitWarning(KinemapWarning):
    """The cube has no usable BUNIT; values are carried in arbitrary units."""


class BeamWarning(KinemapWarning):
    """Something about the beam(s) the user should know."""


class NoiseWarning(KinemapWarning):
    """The noise estimate rests on few channels or failed for some pixels."""


class FitWarning(KinemapWarning):
    """Fits that failed or hit a bound for a notable fraction of pixels."""


class OutputWarning(KinemapWarning):
    """Something about the output folder: files kept, leftovers of killed runs removed."""


class ProductWarning(KinemapWarning):
    """A product holds no finite value (it is written, and listed in the manifest)."""
