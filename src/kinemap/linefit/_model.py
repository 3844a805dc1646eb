"""The description of a line model: which parameters each Gaussian component uses.

A model is a list of Gaussian components plus an optional baseline.  Component ``j`` is
described by five numbers ``(axis, amplitude, scale, velocity, sigma)``:

* ``axis`` -- row of the velocity-axis array the component is evaluated on (one row per
  spectral line of different rest value in a cube);
* ``amplitude`` -- index of the parameter holding its amplitude; the component's amplitude
  is ``scale * params[amplitude]``, so several components can share an amplitude with
  fixed ratios (for example the 3:1 ratio of the two [N II] lines);
* ``velocity`` -- index of its centroid-velocity parameter (km/s);
* ``sigma`` -- index of its intrinsic-dispersion parameter (km/s).

Line parameters are numbered ``0 .. n_line_params-1``; every index must be used in one role
only.  The baseline parameters follow: ``'constant'`` adds one (``baseline``), ``'linear'``
adds two (``baseline`` at the centre channel and ``baseline_slope`` per channel).
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from kinemap.errors import KinemapError

__all__ = ["LineModel", "BASELINES"]

BASELINES = ("none", "constant", "linear")
_BASELINE_NPAR = {"none": 0, "constant": 1, "linear": 2}

# integer role codes used by the compiled kernels and the bounds/guess code
ROLE_AMP, ROLE_VEL, ROLE_SIG, ROLE_BASE0, ROLE_BASE1 = 0, 1, 2, 3, 4


@dataclass(frozen=True)
class LineModel:
    """Gaussian components (possibly with tied parameters) plus a baseline.

    Parameters
    ----------
    components : sequence of 5-tuples ``(axis, amplitude, scale, velocity, sigma)``
        One tuple per Gaussian component, see the module docstring.  ``scale`` is a
        positive float; the indices are non-negative integers.
    baseline : {'none', 'constant', 'linear'}
        Baseline added to the model (never convolved with the channel response, since a
        constant or a straight line is unchanged by a normalised symmetric kernel).  The
        linear baseline is ``b0 + b1 * (c - (nchan - 1) / 2)`` with ``c`` the channel index.
    param_names : sequence of str, optional
        Names of the line parameters (not the baseline ones); default names are built from
        the roles (``amplitude_1``, ``velocity_1``, ``dispersion_1``, ...).

    Notes
    -----
    Use :meth:`single` for the common case of 1-3 independent components of one line.
    Example of a joint H-alpha + [N II] fit with a shared velocity, one width per ion and
    the [N II] 6583/6548 amplitude ratio fixed to 3 (axes rows: 0 H-alpha, 1 [N II] 6548,
    2 [N II] 6583; parameters ``[A_Ha, v, sigma_Ha, A_6583, sigma_NII]``)::

        LineModel([(0, 0, 1.0, 1, 2), (2, 3, 1.0, 1, 4), (1, 3, 1 / 3, 1, 4)])

    With equal widths in km/s the amplitude ratio equals the ratio of velocity-integrated
    intensities; a ratio of wavelength-integrated fluxes differs by the ratio of rest
    wavelengths (0.5 per cent for the [N II] pair), which the caller can fold into ``scale``.
    """

    components: tuple
    baseline: str = "none"
    param_names: tuple | None = None
    # derived, filled in __post_init__
    n_line_params: int = field(init=False)
    roles: tuple = field(init=False)

    def __post_init__(self):
        if self.baseline not in BASELINES:
            raise KinemapError(
                f"'baseline' must be one of {', '.join(BASELINES)}, got {self.baseline!r}"
            )
        comps = []
        try:
            for c in self.components:
                axis, amp, scale, vel, sig = c
                comps.append((int(axis), int(amp), float(scale), int(vel), int(sig)))
        except (TypeError, ValueError):
            raise KinemapError(
                "'components' must be a sequence of (axis, amplitude, scale, velocity, sigma) "
                f"tuples, got {self.components!r}"
            ) from None
        if not 1 <= len(comps) <= 64:
            raise KinemapError(f"'components' must hold 1 to 64 components, got {len(comps)}")
        roles: dict[int, int] = {}
        for j, (axis, amp, scale, vel, sig) in enumerate(comps):
            if axis < 0:
                raise KinemapError(f"component {j}: 'axis' must be >= 0, got {axis}")
            if not (np.isfinite(scale) and scale > 0):
                raise KinemapError(f"component {j}: 'scale' must be a positive number, got {scale}")
            for idx, role in ((amp, ROLE_AMP), (vel, ROLE_VEL), (sig, ROLE_SIG)):
                if idx < 0:
                    raise KinemapError(f"component {j}: parameter indices must be >= 0, got {idx}")
                if roles.setdefault(idx, role) != role:
                    raise KinemapError(
                        f"component {j}: parameter {idx} is used both as "
                        f"{_ROLE_WORD[roles[idx]]} and as {_ROLE_WORD[role]}; give each role its own index"
                    )
        nline = max(roles) + 1
        missing = sorted(set(range(nline)) - set(roles))
        if missing:
            raise KinemapError(
                f"'components' leave parameter indices {missing} unused; number parameters 0..{nline - 1} without gaps"
            )
        role_list = [roles[i] for i in range(nline)]
        if self.baseline in ("constant", "linear"):
            role_list.append(ROLE_BASE0)
        if self.baseline == "linear":
            role_list.append(ROLE_BASE1)
        object.__setattr__(self, "components", tuple(comps))
        object.__setattr__(self, "n_line_params", nline)
        object.__setattr__(self, "roles", tuple(role_list))
        if self.param_names is None:
            counts = {ROLE_AMP: 0, ROLE_VEL: 0, ROLE_SIG: 0}
            names = []
            for r in role_list[:nline]:
                counts[r] += 1
                names.append(f"{_ROLE_NAME[r]}_{counts[r]}")
        else:
            names = [str(n) for n in self.param_names]
            if len(names) != nline or len(set(names)) != nline:
                raise KinemapError(
                    f"'param_names' must hold {nline} distinct names (one per line parameter), got {len(names)}"
                )
        if self.baseline in ("constant", "linear"):
            names.append("baseline")
        if self.baseline == "linear":
            names.append("baseline_slope")
        object.__setattr__(self, "param_names", tuple(names))

    # ------------------------------------------------------------------ constructors
    @classmethod
    def single(cls, ncomp: int = 1, *, baseline: str = "none") -> "LineModel":
        """``ncomp`` independent components of one line on velocity axis 0.

        Parameters are ``[A1, v1, sigma1, A2, v2, sigma2, ..., baseline...]``.
        """
        if isinstance(ncomp, bool) or not isinstance(ncomp, (int, np.integer)) or not 1 <= ncomp <= 3:
            raise KinemapError(f"'ncomp' must be 1, 2, 3 or 'auto', got {ncomp!r}")
        comps = [(0, 3 * j, 1.0, 3 * j + 1, 3 * j + 2) for j in range(int(ncomp))]
        return cls(tuple(comps), baseline=baseline)

    # ------------------------------------------------------------------ properties
    @property
    def ncomp(self) -> int:
        """Number of Gaussian components."""
        return len(self.components)

    @property
    def npar(self) -> int:
        """Number of free parameters (line + baseline)."""
        return len(self.roles)

    @property
    def naxes(self) -> int:
        """Number of velocity axes the model needs (largest axis index + 1)."""
        return max(c[0] for c in self.components) + 1

    @property
    def is_single(self) -> bool:
        """True for independent components of one line (layout of :meth:`single`)."""
        if self.ncomp > 3:
            return False
        return self.components == LineModel.single(self.ncomp).components

    def arrays(self):
        """Integer/float arrays for the compiled kernels."""
        c = np.array([x[0] for x in self.components], dtype=np.int64)
        ia = np.array([x[1] for x in self.components], dtype=np.int64)
        sc = np.array([x[2] for x in self.components], dtype=np.float64)
        iv = np.array([x[3] for x in self.components], dtype=np.int64)
        isg = np.array([x[4] for x in self.components], dtype=np.int64)
        return c, ia, sc, iv, isg, np.array(self.roles, dtype=np.int64), _BASELINE_CODE[self.baseline]


_ROLE_WORD = {ROLE_AMP: "an amplitude", ROLE_VEL: "a velocity", ROLE_SIG: "a dispersion"}
_ROLE_NAME = {ROLE_AMP: "amplitude", ROLE_VEL: "velocity", ROLE_SIG: "dispersion"}
_BASELINE_CODE = {"none": 0, "constant": 1, "linear": 2}


def as_model(model: LineModel | None, ncomp, baseline: str) -> LineModel:
    """Resolve the (model, ncomp, baseline) keywords of the public functions."""
    if model is None:
        return LineModel.single(ncomp, baseline=baseline)
    if not isinstance(model, LineModel):
        raise KinemapError(f"'model' must be a kinemap.linefit.LineModel, got {type(model).__name__}")
    return model
