"""Hints: starting values for a metadynamics bias along a designed CV.

Pure functions on plain numbers and dicts (no file I/O). From the per-state
mean and spread of the CV in the input data (``spec["states"]``), a
temperature and an MD step, :func:`suggest_hints` proposes a kernel width
and height, a deposition interval, a well-tempered bias factor, walls and a
grid, and estimates how long filling each basin will take; :func:`format_hints`
renders the result as text.

Every number here is a starting point to validate, not a guarantee (see
:data:`CAUTION`). Each rule names its source, or says "common practice"; values
recalled without a reference at hand say "from memory".

Refusals and warnings
---------------------
The hints refuse (:class:`~cvdesign.errors.InputError`) rather than print
numbers that cannot be right, and warn (the ``warnings`` list of the result,
shown first by :func:`format_hints`) about numbers that are possible but
unusual enough to suggest a mistake. The bounds, with their reasons, are
:data:`TEMPERATURE_LIMITS_K`, :data:`MD_STEP_LIMITS_FS`,
:data:`SPREAD_RESOLUTION`, :data:`MAX_GRID_BINS` and the barrier rule of
:func:`suggest_hints` (an estimate below kT is refused).

Units: CV values, widths and grid in the CV's own units (often dimensionless),
energies in kJ/mol, times in ps, the MD step in fs (``md_step_fs``), temperatures in K.

Kernels
-------
The 1-D kernels are normalized densities of the offset ``ds = s - s0``:

* Gaussian, ``exp(-ds**2 / (2 sigma**2)) / (sigma sqrt(2 pi))``;
* Lucy's kernel (Lucy, Astron. J. 82, 1013, 1977),
  ``W(ds, h) = 5/(4h) (1 + 3q) (1 - q)**3`` for ``q = |ds|/h <= 1``, else 0.

The 1-D constant, derived here: with ``u = 1 - q``,
``int_0^1 (1 + 3q)(1 - q)^3 dq = int_0^1 (4u^3 - 3u^4) du = 1 - 3/5 = 2/5``, so
``int_{-h}^{h} (1 + 3q)(1 - q)^3 dr = 2h * 2/5 = 4h/5`` and the 1-D
normalization is ``5/(4h)``. The derivative is
``dW/ds = -15 ds (1 - q)**2 / h**3``: zero at ``ds = 0`` and at the cutoff, so
the bias force is continuous everywhere; the second derivative,
``-15 (1 - q)(1 - 3q) / h**3``, is continuous too (zero at the cutoff).
The variance of Lucy's kernel is
``2 h^2 * 5/(4h) * h * int_0^1 q^2 (1 + 3q)(1 - q)^3 dq = (5 h^2 / 2) * 4/105
= 2 h^2 / 21``, so the cutoff with the variance of a Gaussian of width
``sigma`` is ``h = sqrt(21/2) sigma ~= 3.24 sigma`` (:func:`lucy_cutoff_for_sigma`).

Fill-time model
---------------
Each state is a harmonic basin with the state's std ``sigma``:
``F(s) = kT (s - mu)**2 / (2 sigma**2)``. Filling it up to a free-energy level
``L`` (bias ``V = (L - F)_+``) takes the bias volume
``int (L - F(s))_+ ds = (4/3) sigma L sqrt(2 L / kT)`` (:func:`fill_volume`;
derivation there). A kernel of peak height ``w0`` adds ``w0 * a`` of volume,
``a = sigma_k sqrt(2 pi)`` (Gaussian) or ``4 h / 5`` (Lucy), every ``tau_D``.
See :func:`fill_time_metadynamics` and :func:`fill_time_well_tempered`.

References
----------
.. [1] L. B. Lucy, "A numerical approach to the testing of the fission
   hypothesis", Astron. J. 82, 1013 (1977).
.. [2] A. Barducci, G. Bussi, M. Parrinello, "Well-tempered metadynamics: a
   smoothly converging and tunable free-energy method", Phys. Rev. Lett. 100,
   020603 (2008).
.. [3] A. Laio, M. Parrinello, "Escaping free-energy minima", Proc. Natl. Acad.
   Sci. USA 99, 12562 (2002) (from memory).
.. [4] A. Laio, A. Rodriguez-Fortea, F. L. Gervasio, M. Ceccarelli,
   M. Parrinello, "Assessing the accuracy of metadynamics", J. Phys. Chem. B
   109, 6714 (2005) (from memory).
"""

import math
from collections.abc import Mapping

import numpy as np

from ..constants import BOLTZMANN_KJ_MOL_K
from ..errors import InputError

__all__ = [
    "CAUTION",
    "FOLD_SPREADS",
    "KERNELS",
    "MAX_GRID_BINS",
    "MD_STEP_LIMITS_FS",
    "POOR_TIME_RATIO",
    "SPREAD_RESOLUTION",
    "TEMPERATURE_LIMITS_K",
    "states_at_bounds",
    "bias_factor_for_barrier",
    "check_run_conditions",
    "fill_time_metadynamics",
    "fill_time_well_tempered",
    "fill_volume",
    "format_hints",
    "gaussian_kernel",
    "gaussian_kernel_derivative",
    "kernel_area_per_height",
    "lucy_cutoff_for_sigma",
    "lucy_kernel",
    "lucy_kernel_derivative",
    "spec_hints",
    "suggest_hints",
]

#: Kernel kinds :func:`suggest_hints` knows.
KERNELS = ("gaussian", "lucy")

#: The caution every stored or printed hint carries.
CAUTION = (
    "These hints are starting points to validate, not guarantees: they come from rules of "
    "thumb and a harmonic model of each state built from short runs of the states. Check them "
    "in short biased test runs (the CV's response to the bias, the walker's return to "
    "visited regions, convergence of the free-energy estimate) before a production run."
)

HINTS_FORMAT = "cvdesign-hints"
HINTS_VERSION = 1

_SQRT_2PI = math.sqrt(2.0 * math.pi)
_LUCY_SIGMA_TO_CUTOFF = math.sqrt(21.0 / 2.0)
_DEFAULT_LEVELS = (20.0, 40.0, 60.0, 80.0, 100.0)

#: Temperatures the hints accept, K: ``(refuse below, refuse above, warn below, warn
#: above)``. Below 1 K kT is under 0.01 kJ/mol and no barrier is crossed thermally;
#: above 5000 K nearly every substance has boiled (from memory) and classical force
#: fields are far outside what they were made for, so such a value is most likely in
#: other units (degrees Celsius, kT, kJ/mol). Molecular simulations mostly run between
#: 100 K and 2000 K (common practice), so values outside that get a warning.
TEMPERATURE_LIMITS_K = (1.0, 5000.0, 100.0, 2000.0)

#: MD steps the hints accept, fs: ``(refuse below, refuse above, warn below, warn
#: above)``. Atomistic MD integrates with 0.5-2 fs (4 fs with heavier hydrogens),
#: ab initio and path-integral MD with 0.1-1 fs, coarse-grained models with up to
#: about 40 fs (common practice, from memory). A step beyond 100 fs is no stable MD
#: step of any of these, and one below 0.01 fs is most likely given in ps (0.002 ps =
#: 2 fs); both are refused. Steps above 5 fs (coarse-grained only) or below 0.1 fs
#: get a warning.
MD_STEP_LIMITS_FS = (0.01, 100.0, 0.1, 5.0)

#: Relative resolution of a within-state spread: a state whose CV std is at most this
#: times the CV's scale (the largest ``|mean|``, spread of the means or std of the
#: states), or at most 1e-12 CV units, has no spread the data can resolve. Trajectory
#: coordinates are single precision (about 1.2e-7 relative), so 1e-6 is some ten
#: rounding steps: below it the "spread" is rounding of a frozen (constrained, rigid,
#: constant) coordinate, far below any thermal fluctuation (a stiff bond moves about
#: 3e-3 nm at 300 K; from memory). A kernel width or grid built from it would be
#: meaningless, so the hints refuse such a state (or leave it out, saying so, when
#: ``leave_out_frozen``); there is no physical minimum width to fall back on because
#: the CV's units are not known here (nm, rad or dimensionless combinations).
SPREAD_RESOLUTION = 1e-6
_SPREAD_FLOOR = 1e-12

#: Largest grid, in bins, the hints propose. A 1-D bias grid of 10^2-10^4 points is
#: usual (common practice, from memory); more than 10^5 means the kernel is tiny next
#: to the range to explore (one state far narrower than the distance between states),
#: and the bias would take correspondingly long to fill it, so the hints refuse and say
#: what to change instead of proposing such a grid.
MAX_GRID_BINS = 100_000

#: Barrier estimates above this, kJ/mol, get a warning: conformational changes and
#: most reactions have barriers well below it (a C-C bond takes about 350 kJ/mol to
#: break; from memory), so a larger value is likely in J/mol.
_BARRIER_WARN_KJ_MOL = 400.0

#: Deposition intervals below this many MD steps get a warning (intervals of
#: 100-1000 steps, about 0.1-1 ps, are usual; common practice, from memory).
_FEW_STEPS = 10

#: A 95 % interval of the autocorrelation time whose upper end is more than this many times
#: its lower end gets a warning. Our choice: for the asymptotic interval on log tau
#: (Madras and Sokal 1988) a factor of 10 is a relative standard error of about 60 %, an
#: estimate known only to its order of magnitude (fewer than about six summation windows of
#: frames per state).
POOR_TIME_RATIO = 10.0

#: The fastest initial deposition rate (kernel height / interval), in kJ/mol per ps, that
#: the hints suggest: usual rates are of order 1 kJ/mol/ps (heights of about 1 kJ/mol every
#: 0.5-2 ps; common practice, from memory), and a faster one lets motions slower than the
#: CV lag behind the bias. An interval sized from a short autocorrelation time is
#: lengthened to it; a faster rate (only under ``max_interval_ps``) gets a warning.
_FAST_RATE_KJ_MOL_PS = 5.0

_SOURCES = {
    "lucy": "Lucy, Astron. J. 82, 1013 (1977)",
    "wt": "Barducci, Bussi and Parrinello, Phys. Rev. Lett. 100, 020603 (2008)",
    "metad": "Laio and Parrinello, Proc. Natl. Acad. Sci. USA 99, 12562 (2002) (from memory)",
    "accuracy": ("Laio, Rodriguez-Fortea, Gervasio, Ceccarelli and Parrinello, "
                 "J. Phys. Chem. B 109, 6714 (2005) (from memory)"),
}


# --------------------------------------------------------------------------
# validation


def _number(name, value, *, positive=True, allow_zero=False):
    """`value` as a finite float, > 0 (or >= 0) when asked; InputError naming `name` otherwise."""
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise InputError(f"{name} must be a number; got {value!r}")
    x = float(value)
    if not math.isfinite(x):
        raise InputError(f"{name}={value!r} must be finite")
    if positive and (x < 0.0 or (x == 0.0 and not allow_zero)):
        bound = ">= 0" if allow_zero else "> 0"
        raise InputError(f"{name}={value!r} must be {bound}")
    return x


def _within_rate(rate):
    """Whether an initial deposition rate (kJ/mol per ps) is within the rate the hints
    accept without a warning, :data:`_FAST_RATE_KJ_MOL_PS` (to rounding)."""
    return rate <= _FAST_RATE_KJ_MOL_PS * (1.0 + 1e-9)


def _unfolded_width(states, fit, folded, bounds, width_fraction):
    """The kernel width, CV units, that keeps its fraction of each state's spread where a
    folded CV is steepest, and its ratio to the width from the spreads along the CV; None
    when it is not wider, or the CV is bounded on one side only.

    Model (derived here): near its bound ``b`` the CV is ``b -/+ a (1 - cos u)`` of one
    coordinate ``u`` with ``a`` half the reachable range; a state centred on the fold with
    spread ``s`` of ``u`` has its mean ``d = a s^2 / 2`` from the bound (to second order), so
    ``s = sqrt(2 d / a)``, and where the CV is steepest (slope ``a``) that spread is
    ``a s = sqrt(2 d a)`` CV units. States inside the range keep their spread along the CV.
    """
    lo, hi = bounds
    if lo is None or hi is None:  # the model needs the half range (a bounded CV)
        return None
    half = 0.5 * (hi - lo)
    scales = []
    for name, v in fit.items():
        if name in folded:
            d = abs(v["mean"] - (lo if folded[name] == "lower" else hi))
            scales.append(math.sqrt(2.0 * d * half))
        else:
            scales.append(v["std"])
    if not scales:
        return None
    wide = width_fraction * min(scales)
    narrow = width_fraction * min(v["std"] for v in fit.values())
    if not (narrow > 0 and wide > 1.5 * narrow):
        return None
    return wide, wide / narrow


def _kernel_kind(kernel):
    if kernel not in KERNELS:
        raise InputError(f"kernel={kernel!r} is not known; choose one of {', '.join(map(repr, KERNELS))}")
    return kernel


def _kt(temperature):
    return BOLTZMANN_KJ_MOL_K * _number("temperature", temperature)


def check_run_conditions(temperature, md_step_fs):
    """Refuse an impossible temperature or MD step; return warnings about unusual ones.

    The bounds and their reasons are :data:`TEMPERATURE_LIMITS_K` and
    :data:`MD_STEP_LIMITS_FS`.

    Parameters
    ----------
    temperature : float
        Temperature of the biased run, in K.
    md_step_fs : float
        MD step of the biased run, in fs.

    Returns
    -------
    list of str
        Warnings (empty when both values are usual).

    Raises
    ------
    InputError
        A value that is not a positive number, or outside the accepted range;
        the message says what to give instead.

    Examples
    --------
    >>> check_run_conditions(300.0, 2.0)
    []
    >>> check_run_conditions(300.0, 20.0)[0].startswith("md_step_fs=20 fs is longer than 5 fs")
    True
    """
    t = _number("temperature", temperature)
    dt = _number("md_step_fs", md_step_fs)
    t_lo, t_hi, t_warn_lo, t_warn_hi = TEMPERATURE_LIMITS_K
    if t < t_lo:
        raise InputError(
            f"temperature={temperature!r} K is below {t_lo:g} K: no barrier is crossed "
            "thermally there, so there is nothing to hint; give the temperature of the biased "
            "run in kelvin (e.g. 300)")
    if t > t_hi:
        raise InputError(
            f"temperature={temperature!r} K is above {t_hi:g} K, hotter than any molecular "
            "simulation the hints are made for; give the temperature of the biased run in "
            "kelvin (e.g. 300), not in other units")
    dt_lo, dt_hi, dt_warn_lo, dt_warn_hi = MD_STEP_LIMITS_FS
    if dt < dt_lo:
        raise InputError(
            f"md_step_fs={md_step_fs!r} fs is shorter than {dt_lo:g} fs, shorter than any MD "
            f"step; give the MD step in femtoseconds (if {dt:g} is in ps, that is "
            f"{dt * 1000:g} fs)")
    if dt > dt_hi:
        raise InputError(
            f"md_step_fs={md_step_fs!r} fs ({dt / 1000:g} ps) is longer than {dt_hi:g} fs, "
            "beyond the stable step of any MD integrator (atomistic 0.5-4 fs, coarse-grained "
            "up to about 40 fs); give the MD step of the biased run in femtoseconds "
            "(2 fs = 0.002 ps)")
    warnings = []
    if t < t_warn_lo:
        warnings.append(
            f"temperature={t:g} K is below {t_warn_lo:g} K, unusual for a molecular "
            f"simulation; check that it is in kelvin (25 degrees Celsius = 298.15 K)")
    elif t > t_warn_hi:
        warnings.append(
            f"temperature={t:g} K is above {t_warn_hi:g} K, unusual for a molecular "
            f"simulation; check that it is the temperature of the biased run, in kelvin")
    if dt < dt_warn_lo:
        warnings.append(
            f"md_step_fs={dt:g} fs is shorter than {dt_warn_lo:g} fs, unusually short even "
            "for ab initio MD; check that it is in femtoseconds, not picoseconds")
    elif dt > dt_warn_hi:
        warnings.append(
            f"md_step_fs={dt:g} fs is longer than {dt_warn_hi:g} fs: usual for coarse-grained "
            "models only (atomistic MD uses 0.5-4 fs); check that it is the MD step in "
            "femtoseconds")
    return warnings


def _frozen_states(st):
    """({name: std} of the states without a resolvable spread, the threshold, the scale)."""
    means = [v["mean"] for v in st.values()]
    scale = max([abs(m) for m in means] + [max(means) - min(means)]
                + [v["std"] for v in st.values()])
    threshold = max(_SPREAD_FLOOR, SPREAD_RESOLUTION * scale)
    return {k: v["std"] for k, v in st.items() if v["std"] <= threshold}, threshold, scale


def _frozen_text(frozen, threshold, scale):
    names = ", ".join(f"{k!r} (std {v:.3g} CV units)" for k, v in frozen.items())
    bound = (f"{threshold:.3g} CV units (the floor)" if threshold == _SPREAD_FLOOR else
             f"{threshold:.3g} = {SPREAD_RESOLUTION:g} x the CV's scale {scale:.3g} (largest "
             "|mean|, spread of the means or std)")
    return (f"{names}, not above {bound}, below what "
            "single-precision trajectory data resolve; the CV does not move within such a state "
            "(a frozen or constrained coordinate, or constant input)")


def _check_states(states):
    if not isinstance(states, Mapping) or not states:
        raise InputError(
            "states must be a non-empty dict {name: {'mean': float, 'std': float, ...}} "
            f"(as spec['states']); got {states!r}"
        )
    out = {}
    for name, entry in states.items():
        if not isinstance(entry, Mapping) or "mean" not in entry or "std" not in entry:
            raise InputError(f"states[{name!r}] must be a dict with 'mean' and 'std'; got {entry!r}")
        mean = _number(f"states[{name!r}]['mean']", entry["mean"], positive=False)
        std = _number(f"states[{name!r}]['std']", entry["std"], allow_zero=True)
        n = entry.get("n_frames")
        out[str(name)] = {"mean": mean, "std": std, "n_frames": None if n is None else int(n)}
    return out


# --------------------------------------------------------------------------
# kernels


def _as_out(x):
    return float(x) if np.ndim(x) == 0 else x


def gaussian_kernel(ds, sigma):
    """Normalized 1-D Gaussian kernel of the offset `ds`.

    Parameters
    ----------
    ds : float or array-like
        Offset ``s - s0`` from the kernel center, in CV units.
    sigma : float
        Width (standard deviation), in CV units, > 0.

    Returns
    -------
    float or ndarray of float64
        ``exp(-ds**2 / (2 sigma**2)) / (sigma sqrt(2 pi))``, in 1/(CV units);
        it integrates to 1 over ``ds``.

    Examples
    --------
    >>> round(gaussian_kernel(0.0, 1.0), 6)
    0.398942
    """
    sigma = _number("sigma", sigma)
    ds = np.asarray(ds, dtype=np.float64)
    return _as_out(np.exp(-0.5 * (ds / sigma) ** 2) / (sigma * _SQRT_2PI))


def gaussian_kernel_derivative(ds, sigma):
    """Derivative with respect to `ds` of :func:`gaussian_kernel`.

    Parameters
    ----------
    ds : float or array-like
        Offset ``s - s0``, in CV units.
    sigma : float
        Width, in CV units, > 0.

    Returns
    -------
    float or ndarray of float64
        ``-ds / sigma**2 * gaussian_kernel(ds, sigma)``, in 1/(CV units)**2.

    Examples
    --------
    >>> gaussian_kernel_derivative(0.0, 1.0)
    -0.0
    """
    sigma = _number("sigma", sigma)
    ds = np.asarray(ds, dtype=np.float64)
    return _as_out(-ds / sigma**2 * np.exp(-0.5 * (ds / sigma) ** 2) / (sigma * _SQRT_2PI))


def lucy_kernel(ds, cutoff):
    """Lucy's kernel in 1-D normalization (Lucy, Astron. J. 82, 1013, 1977).

    Parameters
    ----------
    ds : float or array-like
        Offset ``s - s0``, in CV units.
    cutoff : float
        Support radius ``h``, in CV units, > 0: the kernel is zero for
        ``|ds| >= h``.

    Returns
    -------
    float or ndarray of float64
        ``5/(4h) (1 + 3q)(1 - q)**3`` with ``q = |ds|/h`` for ``q <= 1``,
        else 0, in 1/(CV units). It integrates to 1: the integral of
        ``(1 + 3q)(1 - q)**3`` over ``[-h, h]`` is ``4h/5`` (derived in the
        module notes).

    Examples
    --------
    >>> lucy_kernel(0.0, 2.0), lucy_kernel(2.0, 2.0)
    (0.625, 0.0)
    """
    h = _number("cutoff", cutoff)
    q = np.abs(np.asarray(ds, dtype=np.float64)) / h
    inside = q < 1.0
    qi = np.where(inside, q, 1.0)
    return _as_out(np.where(inside, 1.25 / h * (1.0 + 3.0 * qi) * (1.0 - qi) ** 3, 0.0))


def lucy_kernel_derivative(ds, cutoff):
    """Derivative with respect to `ds` of :func:`lucy_kernel`.

    Parameters
    ----------
    ds : float or array-like
        Offset ``s - s0``, in CV units.
    cutoff : float
        Support radius ``h``, in CV units, > 0.

    Returns
    -------
    float or ndarray of float64
        ``-15 ds (1 - q)**2 / h**3`` for ``q = |ds|/h <= 1``, else 0, in
        1/(CV units)**2. It is zero at ``ds = 0`` and at ``|ds| = h``, so it is
        continuous everywhere.

    Examples
    --------
    >>> lucy_kernel_derivative(1.0, 2.0)
    -0.46875
    """
    h = _number("cutoff", cutoff)
    ds = np.asarray(ds, dtype=np.float64)
    q = np.abs(ds) / h
    inside = q < 1.0
    qi = np.where(inside, q, 1.0)
    return _as_out(np.where(inside, -15.0 * ds * (1.0 - qi) ** 2 / h**3, 0.0))


def lucy_cutoff_for_sigma(sigma):
    """The Lucy cutoff whose kernel has the variance of a Gaussian of width `sigma`.

    Parameters
    ----------
    sigma : float
        Gaussian width, in CV units, > 0.

    Returns
    -------
    float
        ``h = sqrt(21/2) sigma ~= 3.2404 sigma``, in CV units. The variance of
        Lucy's kernel is ``2 h**2 / 21`` (derived in the module notes).

    Examples
    --------
    >>> round(lucy_cutoff_for_sigma(1.0), 4)
    3.2404
    """
    return _LUCY_SIGMA_TO_CUTOFF * _number("sigma", sigma)


def kernel_area_per_height(kernel, width):
    """Area under a kernel of unit peak height.

    Parameters
    ----------
    kernel : {'gaussian', 'lucy'}
        Kernel kind.
    width : float
        Gaussian sigma or Lucy cutoff ``h``, in CV units, > 0.

    Returns
    -------
    float
        ``sqrt(2 pi) sigma`` (Gaussian) or ``4 h / 5`` (Lucy), in CV units: a
        bump of peak height ``w0`` kJ/mol adds ``w0 * area`` kJ/mol x CV units
        of bias volume.

    Examples
    --------
    >>> round(kernel_area_per_height("gaussian", 1.0), 4), kernel_area_per_height("lucy", 1.0)
    (2.5066, 0.8)
    """
    kernel = _kernel_kind(kernel)
    width = _number("width", width)
    return _SQRT_2PI * width if kernel == "gaussian" else 0.8 * width


# --------------------------------------------------------------------------
# well-tempered bias factor


def bias_factor_for_barrier(barrier, temperature, *, target_barrier_kt=3.0, minimum=2.0):
    """Bias factor so that a barrier is seen reduced to a few kT.

    In well-tempered metadynamics (Barducci, Bussi and Parrinello, Phys. Rev.
    Lett. 100, 020603, 2008) the bias converges to ``-(1 - 1/gamma) F(s)``
    (up to a constant), so the CV is sampled as if at temperature
    ``T + dT`` with the bias factor ``gamma = (T + dT) / T``, and a barrier
    ``dG`` along the CV is seen as ``dG / gamma`` (statement checked from
    memory against that paper). Choosing ``dG / gamma = n kT`` gives
    ``gamma = dG / (n kT)``; ``n`` of about 2-5 is common practice (from
    memory).

    Parameters
    ----------
    barrier : float
        Barrier estimate ``dG`` along the CV, in kJ/mol, > 0.
    temperature : float
        Temperature ``T``, in K, > 0.
    target_barrier_kt : float, default=3.0
        The barrier to be seen, ``n``, in units of kT, > 0.
    minimum : float, default=2.0
        Lower bound on the returned factor (a barrier already below ``n kT``
        needs little bias), >= 1.

    Returns
    -------
    float
        ``max(dG / (n kT), minimum)``, dimensionless.

    Examples
    --------
    >>> round(bias_factor_for_barrier(60.0, 300.0), 3)
    8.018
    """
    barrier = _number("barrier", barrier)
    kt = _kt(temperature)
    n = _number("target_barrier_kt", target_barrier_kt)
    minimum = _number("minimum", minimum)
    if minimum < 1.0:
        raise InputError(f"minimum={minimum!r} must be >= 1 (a bias factor is >= 1)")
    return max(barrier / (n * kt), minimum)


# --------------------------------------------------------------------------
# fill volume and fill times


def fill_volume(level, std, temperature):
    """Bias volume that fills a harmonic basin up to a free-energy level.

    With ``F(s) = kT (s - mu)**2 / (2 std**2)`` and ``x_L = std sqrt(2 L / kT)``
    (where ``F = L``),
    ``int (L - F)_+ ds = 2 (L x_L - kT x_L**3 / (6 std**2)) = 2 x_L (L - L/3)
    = (4/3) L x_L``.

    Parameters
    ----------
    level : float
        Free-energy level ``L`` above the basin bottom, in kJ/mol, >= 0.
    std : float
        Spread of the CV in the basin, in CV units, > 0.
    temperature : float
        Temperature, in K, > 0.

    Returns
    -------
    float
        ``(4/3) std L sqrt(2 L / kT)``, in kJ/mol x CV units.

    Examples
    --------
    >>> kt = BOLTZMANN_KJ_MOL_K * 300.0
    >>> round(fill_volume(2 * kt, 1.0, 300.0) / kt, 6)   # (4/3) * 2 * 2
    5.333333
    """
    level = _number("level", level, allow_zero=True)
    std = _number("std", std)
    kt = _kt(temperature)
    return 4.0 / 3.0 * std * level * math.sqrt(2.0 * level / kt)


def fill_time_metadynamics(level, std, *, temperature, height, area_per_height, interval_ps):
    """Time for plain metadynamics to fill a harmonic basin up to `level`.

    Quasi-static model: every ``interval_ps`` a kernel adds
    ``height * area_per_height`` of bias volume, all of it inside the basin,
    until the volume reaches :func:`fill_volume` (after which the basin is
    flat up to ``level``; Laio and Parrinello, Proc. Natl. Acad. Sci. USA 99,
    12562, 2002, from memory, for the filling picture).

    Parameters
    ----------
    level : float
        Free-energy level to fill to (e.g. the barrier), in kJ/mol, >= 0.
    std : float
        Spread of the CV in the basin, in CV units, > 0.
    temperature : float
        Temperature, in K, > 0.
    height : float
        Kernel peak height, in kJ/mol, > 0.
    area_per_height : float
        Kernel area per unit height (:func:`kernel_area_per_height`), in CV
        units, > 0.
    interval_ps : float
        Deposition interval, in ps, > 0.

    Returns
    -------
    float
        ``fill_volume / (height * area_per_height) * interval_ps``, in ps. It
        scales as ``level**1.5`` and as ``1 / height``.

    Examples
    --------
    >>> kt = BOLTZMANN_KJ_MOL_K * 300.0
    >>> t = fill_time_metadynamics(2 * kt, 1.0, temperature=300.0, height=kt,
    ...                            area_per_height=1.0, interval_ps=1.0)
    >>> round(t, 6)
    5.333333
    """
    vol = fill_volume(level, std, temperature)
    height = _number("height", height)
    area = _number("area_per_height", area_per_height)
    interval = _number("interval_ps", interval_ps)
    return vol / (height * area) * interval


def _wt_rate_ratio(bl, gamma):
    """D/N of the well-tempered model at beta*L = `bl`, both scaled by exp(bl) and 1/std.

    N: Boltzmann average weight exp(-V/(kB dT)) times the normalization;
    D: the normalization of the walker's distribution.
    """
    # imported here, as integrate below: at module level they cost every spec's loading
    # (apply, check) about 0.2 s, and most loads compute no hint
    from scipy import special

    root = math.sqrt(bl)
    tail = _SQRT_2PI * float(special.erfcx(root))
    num = 2.0 * math.sqrt(2.0 * bl) + tail
    den = math.exp(bl / gamma) * math.sqrt(2.0 * math.pi * gamma) * float(special.erf(math.sqrt(bl / gamma))) + tail
    return den / num


def fill_time_well_tempered(level, std, *, temperature, height, area_per_height, interval_ps, bias_factor):
    """Time for well-tempered metadynamics to fill a harmonic basin up to `level`.

    Model (ours; quasi-static): the bias keeps the converged well-tempered
    shape (Barducci, Bussi and Parrinello, Phys. Rev. Lett. 100, 020603, 2008)
    up to a rising level ``L``, ``V(s) = (1 - 1/gamma) (L - F(s))_+``, with
    ``F`` the harmonic basin of spread ``std``. Its volume is
    ``(1 - 1/gamma) fill_volume(L)``. The walker is Boltzmann-distributed on
    ``F + V`` and each kernel has height
    ``height * exp(-V(s_walker) / (kB dT))``, ``kB dT = (gamma - 1) kT``.
    Inside the filled region ``F + V + kT V / (kB dT) = L``, so the mean
    height is ``height * g(L)`` with, writing ``b = L / kT`` and
    ``x_L = std sqrt(2 b)``,

    ``g = [2 x_L e^{-b} + I] / [e^{-(1 - 1/gamma) b} sqrt(2 pi gamma) std
    erf(sqrt(b / gamma)) + I]``, ``I = sqrt(2 pi) std erfc(sqrt(b))``,

    and the time is ``int_0^level (1 - 1/gamma) 2 x_L interval_ps /
    (height * area_per_height * g(L)) dL``, integrated numerically
    (:func:`scipy.integrate.quad`). At ``L = level`` the barrier seen from the
    basin bottom is ``level / gamma``. For ``gamma -> inf`` this tends to
    :func:`fill_time_metadynamics`.

    Parameters
    ----------
    level : float
        Free-energy level to fill to (e.g. the barrier), in kJ/mol, >= 0.
    std : float
        Spread of the CV in the basin, in CV units, > 0.
    temperature : float
        Temperature, in K, > 0.
    height : float
        Initial kernel peak height, in kJ/mol, > 0.
    area_per_height : float
        Kernel area per unit height, in CV units, > 0.
    interval_ps : float
        Deposition interval, in ps, > 0.
    bias_factor : float
        ``gamma = (T + dT) / T``, > 1.

    Returns
    -------
    float
        Fill time in ps; ``inf`` when it overflows a float (far beyond any
        simulation).

    Examples
    --------
    >>> kw = dict(temperature=300.0, height=1.0, area_per_height=1.0, interval_ps=1.0)
    >>> plain = fill_time_metadynamics(30.0, 1.0, **kw)
    >>> fill_time_well_tempered(30.0, 1.0, bias_factor=5.0, **kw) > plain
    True
    """
    level = _number("level", level, allow_zero=True)
    std = _number("std", std)
    kt = _kt(temperature)
    height = _number("height", height)
    area = _number("area_per_height", area_per_height)
    interval = _number("interval_ps", interval_ps)
    gamma = _number("bias_factor", bias_factor)
    if gamma <= 1.0:
        raise InputError(f"bias_factor={bias_factor!r} must be > 1 (gamma = (T + dT) / T)")
    b_max = level / kt
    if b_max == 0.0:
        return 0.0
    if b_max / gamma > 700.0:
        return math.inf

    def integrand(b):  # dt/db in units of std * kT * interval / (height * area)
        if b <= 0.0:
            return 0.0
        return (1.0 - 1.0 / gamma) * 2.0 * math.sqrt(2.0 * b) * _wt_rate_ratio(b, gamma)

    from scipy import integrate

    value, _ = integrate.quad(integrand, 0.0, b_max, limit=200, epsabs=0.0, epsrel=1e-10)
    t = value * std * kt * interval / (height * area)
    return t if math.isfinite(t) else math.inf


# --------------------------------------------------------------------------
# suggestions


def _finite_or_none(x):
    return float(x) if x is not None and math.isfinite(x) else None


def _barrier_value(name, value, temperature):
    """A barrier estimate in kJ/mol; refused below kT (see :func:`suggest_hints`)."""
    x = _number(name, value)
    kt = _kt(temperature)
    if x < kt:
        raise InputError(
            f"{name}={value!r} kJ/mol is below kT = {kt:.4g} kJ/mol at {temperature:g} K: "
            "states separated by less than kT are not metastable, so there is nothing for a "
            "bias to do along this CV; check the estimate and its unit (kJ/mol; 1 kcal/mol = "
            "4.184 kJ/mol), or leave it out to get a table over estimates")
    return x


def _barriers(barrier, states, temperature):
    """None, one float for all states, or {state: float} covering every state."""
    if barrier is None:
        return None
    if isinstance(barrier, Mapping):
        missing = [s for s in states if s not in barrier]
        extra = [str(k) for k in barrier if k not in states]
        if missing or extra:
            raise InputError(
                f"barrier must give one value per state; missing {missing}, unknown {extra} "
                f"(states are {list(states)})"
            )
        return {s: _barrier_value(f"barrier[{s!r}]", barrier[s], temperature) for s in states}
    value = _barrier_value("barrier", barrier, temperature)
    return {s: value for s in states}


#: A state sits at a bound of the CV (a folded coordinate) when its mean is within this
#: many of its standard deviations of the bound. Derived here: for a dihedral phi
#: spread as a Gaussian of width sigma about phi0 and a CV cos(phi), the distance of the
#: mean of cos(phi) from its bound 1, in standard deviations of cos(phi), is about
#: ``(k^2 + 1) / (2 sqrt(k^2 + 1/2))`` with ``k = phi0 / sigma`` (small sigma): 0.71 for a
#: state centred on the fold, 2 at k = 3.8. A state flagged by 2 thus has the fold
#: within about four of its own spreads of the angle, where thermal motion reaches it.
FOLD_SPREADS = 2.0


def states_at_bounds(states, reachable, *, spreads=FOLD_SPREADS):
    """The states whose mean lies within `spreads` standard deviations of a bound of the CV.

    Parameters
    ----------
    states : dict
        ``{name: {"mean": float, "std": float, ...}}`` in CV units, as a
        spec's ``states``.
    reachable : (float or None, float or None)
        The CV's reachable range (:func:`reachable_range`).
    spreads : float, default=FOLD_SPREADS
        How many standard deviations count as "at" the bound.

    Returns
    -------
    dict
        ``{name: "lower" or "upper"}`` for the states at a bound (the nearer
        bound, in standard deviations, when both are near), in the order of
        `states`; empty when none is.

    Examples
    --------
    >>> states_at_bounds({"closed": {"mean": -0.99, "std": 0.02},
    ...                   "open": {"mean": 0.2, "std": 0.3}}, (-1.0, 1.0))
    {'closed': 'lower'}
    """
    lower, upper = reachable
    out = {}
    for name, st in states.items():
        mean, std = float(st["mean"]), float(st["std"])
        gaps = {}
        if lower is not None:
            gaps["lower"] = mean - lower
        if upper is not None:
            gaps["upper"] = upper - mean
        near = {side: gap for side, gap in gaps.items() if gap <= spreads * std}
        if near:
            out[name] = min(near, key=lambda side: (near[side], side))
    return out


def suggest_hints(
    states,
    *,
    temperature,
    md_step_fs,
    autocorrelation_time_ps=None,
    frame_spacing_ps=None,
    autocorrelation_time_decayed=None,
    autocorrelation_time_interval_ps=None,
    barrier=None,
    kernel="gaussian",
    cv_range=None,
    observed_range=None,
    periodic=False,
    bias_factor=None,
    width_fraction=0.5,
    height_kt=0.5,
    target_barrier_kt=3.0,
    wall_k=3.0,
    grid_fraction=0.2,
    barrier_levels=_DEFAULT_LEVELS,
    max_interval_ps=10.0,
    budget_ns=None,
    max_grid_bins=MAX_GRID_BINS,
    leave_out_frozen=False,
    confinement=None,
    from_biased_runs=False,
):
    """Starting values for a (well-tempered) metadynamics bias along a CV.

    Parameters
    ----------
    states : dict
        ``{name: {"mean": float, "std": float, "n_frames": int}}``: the CV's
        mean and spread per state in CV units, as ``spec["states"]``
        (``n_frames`` optional).
    temperature : float
        Simulation temperature, in K: refused outside 1-5000 K, a warning
        outside 100-2000 K (:data:`TEMPERATURE_LIMITS_K`, with the reasons).
    md_step_fs : float
        MD step of the biased run, in fs: refused outside 0.01-100 fs, a
        warning outside 0.1-5 fs (:data:`MD_STEP_LIMITS_FS`, with the reasons).
    autocorrelation_time_ps : float, optional
        Time for the CV to decorrelate *within a state*, in ps, > 0: the CV's
        own integrated autocorrelation time (a ranking's or spec's
        ``integrated_time_ps``, that of the state where it is longest), not its
        slowest term's (a combination can
        decorrelate more slowly than any of its terms). When None, a
        deposition interval of 1 ps is suggested (common practice, from
        memory). A timescale of the whole data set (e.g. a ranking's
        ``timescale_ps``, measured with all states pooled) may reflect the
        states never interconverting rather than relaxation in a basin; it is
        capped at `max_interval_ps`.
    frame_spacing_ps : float, optional
        Time between the saved frames the autocorrelation time was measured
        on, in ps, > 0 (a ranking's or spec's ``frame_spacing_ps``). A time
        shorter than one spacing is not resolved by the frames (the estimate
        ``dt (1/2 + sum rho)`` is then about half a spacing, whatever the CV's
        own time below it): the interval sized from it is then of the order of
        the spacing, with a warning saying so.
    autocorrelation_time_decayed : bool, optional
        False when the autocorrelation had not decayed within the runs, so the
        time is a lower bound (a ranking's ``integrated_time_decayed``); the
        hints then say that the interval may be too short. None: unknown.
    autocorrelation_time_interval_ps : (float, float), optional
        The time's 95 % interval, ps (a ranking's ``integrated_time_ci_ps``, a
        spec's ``scores.integrated_time_ci_ps``). One whose ends are more than
        :data:`POOR_TIME_RATIO` apart gets a warning: the time, and the
        deposition interval sized from it, are not known to within a factor of
        that much.
    barrier : float or dict, optional
        Barrier estimate ``dG`` to leave the states, in kJ/mol: one value
        for all states or ``{state: value}``. When None, bias factors and fill
        times are tabulated over `barrier_levels`. An estimate below kT is
        refused (states separated by less than kT are not metastable, so a
        bias has nothing to do; a common slip is a value in kcal/mol or in kT);
        one above 400 kJ/mol, more than it takes to break a C-C bond (about
        350 kJ/mol, from memory), gets a warning (a value in J/mol?).
    kernel : {'gaussian', 'lucy'}, default='gaussian'
        Kernel kind. For Lucy's kernel the cutoff has the variance of the
        suggested Gaussian width (:func:`lucy_cutoff_for_sigma`).
    cv_range : (float or None, float or None), optional
        The values the CV can reach, ``(lower, upper)`` in CV units, None on a
        side where it is unbounded (as :attr:`cvdesign.Spec.reachable_range`);
        required, with both ends, when `periodic` (then it is one period).
        A bounded CV (both ends given) gets a grid over the whole range, so
        the bias is defined wherever the CV can go; otherwise the grid is
        clipped to the given end. A wall at or beyond a reachable end is left
        out (``None``): the CV cannot pass it.
    observed_range : (float, float), optional
        Smallest and largest CV value in the input data, CV units (as
        :attr:`cvdesign.Spec.observed_range`); the grid of a CV that is not
        bounded covers it, plus the margins.
    periodic : bool, default=False
        Whether the CV is periodic with period ``cv_range``: no walls then,
        and the grid spans one period.
    bias_factor : float, optional
        Use this well-tempered bias factor (> 1) instead of the suggested one.
    width_fraction : float, default=0.5
        Kernel sigma as a fraction of the smallest within-state std, in
        (0, 1].
    height_kt : float, default=0.5
        Initial kernel height in units of kT, > 0.
    target_barrier_kt : float, default=3.0
        Barrier, in kT, that the bias factor should leave (see
        :func:`bias_factor_for_barrier`).
    wall_k : float, default=3.0
        Walls at the outermost ``mean -/+ wall_k * std`` of the states, > 0.
    grid_fraction : float, default=0.2
        Target grid spacing as a fraction of the kernel sigma, in (0, 1].
    barrier_levels : sequence of float, default=(20, 40, 60, 80, 100)
        Barrier estimates in kJ/mol tabulated when `barrier` is None (each at
        least kT, as `barrier`; the default table leaves out those below kT).
    max_interval_ps : float or None, default=10.0
        Cap on the deposition interval, in ps (None: no cap).
    budget_ns : float, optional
        Simulation length you can afford, in ns; fill times above it are
        flagged.
    max_grid_bins : int, default=MAX_GRID_BINS
        Largest grid the hints propose, in bins; a larger one is refused
        with what to change (see :data:`MAX_GRID_BINS`).
    leave_out_frozen : bool, default=False
        What to do with a state whose spread the data cannot resolve (see
        :data:`SPREAD_RESOLUTION`): refuse (False), or leave it out of the
        kernel width and the fill times, with a warning, keeping its mean
        inside the walls (True; used for specs, where such states are
        recorded as they were measured). When every state is frozen the hints
        are refused either way.
    confinement : dict, optional
        A restraint that confines the CV (e.g. a funnel; :func:`spec_hints`
        builds it from a spec's ``restraints``): ``id`` (str), ``lower`` and
        ``upper`` (the range of CV values the restraint allows, CV units),
        ``walls`` (str: where the restraint's own walls stand), ``reasoning``
        (str: how the range follows from the restraint) and ``fill_note``
        (str: what the fill times mean under it). Then no walls are suggested
        on the CV (``walls`` names the restraint instead) and the grid covers
        the restraint's range plus the margins. Without it, a single state
        gets a warning: walls at its mean -/+ `wall_k` std confine the bias to
        that state, so a run with them cannot leave it.
    from_biased_runs : bool, default=False
        The states' statistics and the autocorrelation time come from biased
        runs, reweighted (:func:`spec_hints` reads it from the spec's
        provenance): a warning says that the time was measured in the biased
        runs' own simulation time and is rough, and so is the interval sized
        from it.

    Returns
    -------
    dict
        JSON-ready (floats, ints, str, None; no NaN):

        * ``format``, ``version``, ``caution`` (str), ``units``;
        * ``warnings``: list of str, values that are possible but unusual
          enough to suggest a mistake (empty when none);
        * ``inputs``: ``temperature_k``, ``md_step_fs``, ``kt_kj_mol``,
          ``autocorrelation_time_ps``, ``autocorrelation_time_interval_ps``
          (``[lower, upper]`` or None), ``barrier_kj_mol`` (None, float, or
          ``{state: float}``), ``states``, ``cv_range`` and
          ``observed_range`` (``[lower, upper]`` or None);
        * ``kernel``: ``kind``, ``sigma`` (Gaussian width or Lucy's
          variance-matched sigma, CV units), ``cutoff`` (Lucy support, CV
          units, or None), ``area_per_height`` (CV units), ``width_fraction``,
          ``reference_state``, ``reference_std`` (CV units);
        * ``height_kj_mol``: initial kernel height, kJ/mol;
        * ``deposition``: ``interval_steps`` (int), ``interval_ps``,
          ``tau_ps`` (the time used), ``capped`` (bool), ``tau_resolved``
          (False when the time is shorter than the frame spacing, None when
          either is unknown), ``tau_lower_bound`` (True when the time did not
          decay, None when unknown), ``rate_kj_mol_ps`` (initial height /
          interval), ``rate_limited`` (True when the interval from the time
          was lengthened toward a rate of at most 5 kJ/mol/ps, which it
          reaches unless ``max_interval_ps`` stops it);
        * ``well_tempered``: ``bias_factor`` (None when tabulated),
          ``delta_t_k`` (K), ``barrier_kj_mol``,
          ``effective_barrier_kj_mol``, ``target_barrier_kt``, ``table``
          (list of ``{barrier_kj_mol, bias_factor, delta_t_k,
          effective_barrier_kj_mol}``);
        * ``walls``: ``{lower, upper, k_std}`` in CV units, or None
          (periodic); ``lower`` or ``upper`` is None where the wall would
          stand at or beyond a reachable end of the CV (not needed there);
          with a `confinement`, ``lower``, ``upper`` and ``k_std`` are None
          and ``restraint`` (its id) and ``restraint_walls`` (str) say what
          confines the CV instead;
        * ``grid``: ``lower``, ``upper``, ``spacing`` (CV units), ``n_bins``,
          ``n_points``, ``periodic``, ``covers_reachable`` (True when the
          grid spans the CV's whole reachable range: a bounded or periodic
          CV; the reasoning says why not otherwise); with a `confinement`
          also ``covers_restraint`` (True: it spans every value the
          restraint allows);
        * ``fill_time``: ``model`` (str), ``budget_ns``, ``note`` (str, with
          a `confinement`: what the times mean under it), ``states``:
          ``{state: [{level_kj_mol, bias_factor, volume, n_kernels,
          metadynamics_ps, metadynamics_ns, well_tempered_ps,
          well_tempered_ns, over_budget}]}`` (times None when beyond float
          range; ``volume`` and ``n_kernels`` are plain metadynamics'
          figures, the bias volume that flattens the basin up to the level
          and the kernels of full height it takes, also in rows with a bias
          factor);
        * ``reasoning``: list of str, one per rule, each with its source or
          label; ``sources``: list of str.

    Raises
    ------
    InputError
        A bad argument (a :class:`ValueError`); the message names it. Also the
        refusals above: an impossible temperature or MD step, a barrier below
        kT, a state without resolvable spread, a grid of more than
        `max_grid_bins` bins.

    Examples
    --------
    >>> states = {"A": {"mean": -1.0, "std": 0.2, "n_frames": 500},
    ...           "B": {"mean": 1.0, "std": 0.3, "n_frames": 500}}
    >>> h = suggest_hints(states, temperature=300.0, md_step_fs=2.0,
    ...                   autocorrelation_time_ps=0.5, barrier=40.0)
    >>> h["kernel"]["sigma"], h["deposition"]["interval_steps"]
    (0.1, 250)
    >>> round(h["well_tempered"]["bias_factor"], 2)
    5.35
    >>> h["warnings"]
    []
    """
    st = _check_states(states)
    warnings = check_run_conditions(temperature, md_step_fs)
    kt = _kt(temperature)
    temperature = float(temperature)
    dt_fs = float(md_step_fs)
    kernel = _kernel_kind(kernel)
    f_width = _number("width_fraction", width_fraction)
    if f_width > 1.0:
        raise InputError(f"width_fraction={width_fraction!r} must be in (0, 1]")
    h_kt = _number("height_kt", height_kt)
    n_target = _number("target_barrier_kt", target_barrier_kt)
    wall_k = _number("wall_k", wall_k)
    f_grid = _number("grid_fraction", grid_fraction)
    if f_grid > 1.0:
        raise InputError(f"grid_fraction={grid_fraction!r} must be in (0, 1]")
    tau = None if autocorrelation_time_ps is None else _number("autocorrelation_time_ps", autocorrelation_time_ps)
    frame_ps = None if frame_spacing_ps is None else _number("frame_spacing_ps", frame_spacing_ps)
    tau_interval = None
    if autocorrelation_time_interval_ps is not None:
        try:
            lo_t, hi_t = autocorrelation_time_interval_ps
        except (TypeError, ValueError):
            raise InputError("autocorrelation_time_interval_ps must be a pair (lower, upper) "
                             f"in ps; got {autocorrelation_time_interval_ps!r}") from None
        lo_t = _number("autocorrelation_time_interval_ps[0]", lo_t)
        hi_t = _number("autocorrelation_time_interval_ps[1]", hi_t)
        if not hi_t >= lo_t:
            raise InputError(f"autocorrelation_time_interval_ps={(lo_t, hi_t)!r} must have "
                             "lower <= upper")
        tau_interval = [lo_t, hi_t]
    if autocorrelation_time_decayed is not None and not isinstance(
            autocorrelation_time_decayed, (bool, np.bool_)):
        raise InputError("autocorrelation_time_decayed must be True, False or None; got "
                         f"{autocorrelation_time_decayed!r}")
    cap = None if max_interval_ps is None else _number("max_interval_ps", max_interval_ps)
    budget = None if budget_ns is None else _number("budget_ns", budget_ns)
    gamma_user = None
    if bias_factor is not None:
        gamma_user = _number("bias_factor", bias_factor)
        if gamma_user <= 1.0:
            raise InputError(f"bias_factor={bias_factor!r} must be > 1")
    barriers = _barriers(barrier, st, temperature)
    if barrier_levels is _DEFAULT_LEVELS:  # the default table: leave out levels below kT
        levels = [v for v in _DEFAULT_LEVELS if v >= kt]  # 100 kJ/mol > kT at 5000 K
    else:
        levels = [_barrier_value(f"barrier_levels[{i}]", v, temperature)
                  for i, v in enumerate(barrier_levels)]
    if barriers is None and not levels:
        raise InputError("barrier_levels must not be empty when barrier is None")
    n_grid_max = max_grid_bins
    if isinstance(n_grid_max, (bool, np.bool_)) or not isinstance(n_grid_max, (int, np.integer)) \
            or n_grid_max < 1:
        raise InputError(f"max_grid_bins={max_grid_bins!r} must be a positive integer")
    if not isinstance(leave_out_frozen, (bool, np.bool_)):
        raise InputError(f"leave_out_frozen must be True or False; got {leave_out_frozen!r}")
    for name, value in (barriers or {}).items():
        if value > _BARRIER_WARN_KJ_MOL:
            warnings.append(
                f"the barrier estimate for {name!r}, {value:g} kJ/mol, is above "
                f"{_BARRIER_WARN_KJ_MOL:g} kJ/mol, more than it takes to break a C-C bond; "
                "check that it is in kJ/mol (not J/mol)")
            break
    frozen, threshold, scale = _frozen_states(st)
    every = len(frozen) == len(st)
    if frozen and (every or not leave_out_frozen):
        todo = ("choose a CV that fluctuates within the states, or check that the input frames "
                "are not all one structure" if every else
                "leave that state out of the states given, or choose a CV that fluctuates "
                "within every state")
        raise InputError(
            f"{'no state has a' if every else 'a state has no'} resolvable spread of the CV; "
            f"hints need the within-state spread: {_frozen_text(frozen, threshold, scale)}. A "
            f"kernel width or grid built from it would be meaningless; {todo}")
    fit = {k: v for k, v in st.items() if k not in frozen}  # kernel width and fill times
    if frozen:
        warnings.append(
            f"left out of the kernel width and the fill times, kept inside the walls: "
            f"{_frozen_text(frozen, threshold, scale)}. Biasing along a CV that does not move "
            "in a state may not help leave it; check the CV")
    if not isinstance(periodic, (bool, np.bool_)):
        raise InputError(f"periodic must be True or False; got {periodic!r}")
    lo_range = hi_range = None
    if cv_range is not None:
        try:
            lo_range, hi_range = cv_range
        except (TypeError, ValueError):
            raise InputError(f"cv_range must be a pair (lower, upper); got {cv_range!r}") from None
        if lo_range is not None:
            lo_range = _number("cv_range[0]", lo_range, positive=False)
        if hi_range is not None:
            hi_range = _number("cv_range[1]", hi_range, positive=False)
        if lo_range is not None and hi_range is not None and not hi_range > lo_range:
            raise InputError(f"cv_range={tuple(cv_range)!r} must have lower < upper")
    if periodic and (lo_range is None or hi_range is None):
        raise InputError("cv_range is required when periodic=True, with both ends (it gives "
                         "the period)")
    conf = _confinement(confinement, periodic)
    lo_seen = hi_seen = None
    if observed_range is not None:
        try:
            lo_seen, hi_seen = observed_range
        except (TypeError, ValueError):
            raise InputError(f"observed_range must be a pair (lower, upper); got "
                             f"{observed_range!r}") from None
        lo_seen = _number("observed_range[0]", lo_seen, positive=False)
        hi_seen = _number("observed_range[1]", hi_seen, positive=False)
        if not hi_seen >= lo_seen:
            raise InputError(f"observed_range={tuple(observed_range)!r} must have lower <= upper")

    folded = {} if cv_range is None or periodic else states_at_bounds(st, (lo_range, hi_range))
    if folded:
        steep = _unfolded_width(st, fit, folded, (lo_range, hi_range), f_width)
        warnings.append(
            "the kernel width comes from the states' spreads along the CV, and "
            + ", ".join(f"state {name!r} sits at the {side}" for name, side in folded.items())
            + " bound of its reachable range (a folded coordinate): there the CV changes only "
            "to second order with its descriptors, so its spread is compressed and the width "
            "is narrower than the CV's scale between the states, where the bias must push"
            + ("" if steep is None else
               f" (about {steep[0]:.3g} CV units there, {steep[1]:.2g} times this width: "
               "the same fraction of the state's spread where the CV is steepest, if the CV "
               "near the bound is half its reachable range times the cosine of one "
               "coordinate, whose spread sqrt(2 d / a) then follows from the mean's distance "
               "d to the bound and that half range a [derived here])")
            + "; a well-tempered run along such a CV (cos and sin of a torsion, in cvdesign's "
            "tutorial 04) needed kernels about 5 times wider to stay stable and accurate; "
            "start wider and check that the run neither heats up nor crosses far more often "
            "than the barrier allows. The fill times count each basin on both sides of its "
            "mean, but the CV ends at the bound: a state there fills in up to about half the "
            "time given")

    if len(st) == 1 and conf is None and not periodic:
        (only,) = st
        warnings.append(
            f"only one state ({only!r}) is given, so the walls at its mean -/+ {wall_k:g} std "
            "and the grid around them confine the bias to that state: a run with them cannot "
            "leave it. Put the walls and the grid around the whole region the bias should "
            "explore (e.g. up to the values of the state it should reach), or make the spec "
            "from runs of two or more states (cvdesign suggest); for a bound ligand, size a "
            "funnel restraint (cvdesign funnel), whose walls the hints then take")

    if from_biased_runs:
        warnings.append(
            "the states' means and spreads were reweighted from biased runs, and the CV's "
            "autocorrelation time was measured in those runs' own simulation time (lagged "
            "pairs weighted as their first frame): the bias changes how fast the CV moves, so "
            "that time, and the deposition interval sized from it, are rough; check the "
            "interval in a short biased test run, or measure the time in unbiased runs of "
            "each state")

    why = []
    tag_cp = "[common practice]"
    tag_cpm = "[common practice, from memory]"

    # kernel width -----------------------------------------------------------
    ref_state = min(fit, key=lambda s: (fit[s]["std"], s))
    ref_std = fit[ref_state]["std"]
    sigma = f_width * ref_std
    cutoff = lucy_cutoff_for_sigma(sigma) if kernel == "lucy" else None
    width = sigma if kernel == "gaussian" else cutoff
    area = kernel_area_per_height(kernel, width)
    why.append(
        f"Kernel width: sigma = {f_width:g} x the smallest within-state std "
        f"({ref_std:.4g}, state {ref_state!r}) = {sigma:.4g} CV units, so a kernel is narrower "
        f"than the basin it fills and the bias resolves the basin's shape {tag_cp}: about "
        f"1/3 to 1/2 of the CV's fluctuation in a basin."
    )
    if kernel == "lucy":
        why.append(
            f"Lucy's kernel (Lucy, Astron. J. 82, 1013, 1977): cutoff h = sqrt(21/2) sigma = "
            f"{cutoff:.4g} CV units, the cutoff whose kernel variance 2h^2/21 equals sigma^2 "
            f"[derived here]; it is exactly zero beyond h and its force (first derivative) is "
            f"continuous, zero at h."
        )
    means = sorted(v["mean"] for v in st.values())
    gaps = [b - a for a, b in zip(means, means[1:])]
    if gaps and min(gaps) < 2.0 * sigma:
        why.append(
            f"Note: two state means are only {min(gaps):.4g} CV units apart, less than two "
            f"kernel widths; this CV separates those states poorly at this kernel width."
        )

    # height -----------------------------------------------------------------
    height = h_kt * kt
    why.append(
        f"Initial kernel height: {h_kt:g} kT = {height:.4g} kJ/mol at {temperature:g} K "
        f"{tag_cpm}: heights of a fraction of kT (roughly 0.1-1.5 kJ/mol near room temperature) "
        f"keep each kernel a small perturbation; smaller heights with the same interval give a "
        f"smoother but slower bias (the error grows with height / interval; Laio et al., "
        f"J. Phys. Chem. B 109, 6714, 2005, from memory)."
    )

    # deposition interval ----------------------------------------------------
    capped = False
    resolved = lower_bound = None
    if tau is None:
        tau_used = 1.0
        warnings.append(
            "no autocorrelation time of the CV is known, so the deposition interval is a "
            "placeholder of 1 ps, not sized from the CV; give the CV's time within the states "
            "(cvdesign hints --autocorrelation-time-ps PS, autocorrelation_time_ps= in Python; "
            "cvdesign suggest records it when the input files store their times, or with "
            "--frame-step-ps)")
        why.append(
            f"Deposition interval: no within-state autocorrelation time is known; 1 ps is used "
            f"{tag_cpm}. A spec records the CV's as scores.integrated_time_ps (written by "
            "cvdesign suggest when the input files' frame spacing is known and the same in every "
            "file); in Python, pass "
            "autocorrelation_time_ps."
        )
    else:
        # unresolved: a decayed time below one frame spacing (a lower bound below it only
        # says the runs or visits are too short, which the lower-bound note says)
        resolved = None if frame_ps is None else bool(
            tau >= frame_ps or autocorrelation_time_decayed is False)
        # an unresolved time still sizes the interval (of the order of the frame spacing):
        # a fallback of 1 ps left the tutorials' biased runs of fast CVs without crossings
        tau_used = tau
        if cap is not None and tau > cap:
            tau_used, capped = cap, True
        why.append(
            f"Deposition interval: deposit no faster than the CV decorrelates, so the "
            f"walker has relaxed under one kernel before the next {tag_cp}; interval = "
            f"max(1, round(tau_ps x 1000 / md_step_fs)) with tau = {tau_used:.4g} ps and "
            f"MD step {dt_fs:g} fs (Laio et al., J. Phys. Chem. B 109, 6714, 2005, from "
            f"memory: the error depends on the deposition rate relative to the CV's "
            f"diffusion).")
        if capped:
            why.append(
                f"Note: {tau:.4g} ps is above "
                f"max_interval_ps = {cap:g} ps and was capped: a longer interval would slow "
                f"the filling for little gain {tag_cpm}. A within-state time this long may "
                f"come from frames saved far apart (the estimate is of the order of the frame "
                f"spacing), from slow motions inside the states (substates the CV sees), or, "
                f"for a timescale of all states pooled, from the states not interconverting in "
                f"the input runs."
            )
        if resolved is False:
            text = (
                f"autocorrelation_time_ps = {tau:.4g} ps is shorter than the spacing of the "
                f"saved frames it was measured on ({frame_ps:.4g} ps): the CV decorrelates "
                f"within about one frame, so the estimate dt (1/2 + sum rho), about half a "
                f"spacing then, is set by the frame spacing rather than by the CV, and so is "
                f"an interval sized from it ({tau_used:.4g} ps): the CV would allow a shorter "
                f"one, motions slower than the CV may need a longer one (the deposition rate "
                f"may lengthen it too: see the reasoning); save frames more often than every "
                f"{frame_ps:.4g} ps to measure the CV's time")
            why.append("Note: " + text + ".")
            warnings.append(text)
        if autocorrelation_time_decayed is not None:
            lower_bound = not bool(autocorrelation_time_decayed)
            if lower_bound and not capped:
                text = (
                    f"autocorrelation_time_ps = {tau:.4g} ps is a lower bound: the CV's "
                    f"autocorrelation had not decayed within the runs, or the runs' means "
                    f"scatter more than this time allows, so the CV relaxes within the "
                    f"states more slowly than this and the interval may be too short; longer "
                    f"runs per state measure it")
                why.append("Note: " + text + ".")
                warnings.append(text)
            elif lower_bound:  # the interval is at its cap; the time itself is still a bound
                text = (
                    f"autocorrelation_time_ps = {tau:.4g} ps, capped above, is itself a lower "
                    f"bound (not decayed within the runs, or their means scatter more than it "
                    f"allows): slow motions inside the states, which a bias along this CV "
                    f"would not wait for; longer runs per state measure it")
                why.append("Note: " + text + ".")
                warnings.append(text)
    steps = max(1, int(round(tau_used * 1000.0 / dt_fs)))
    # no faster than the rate the hints flag: the interval from a short time is lengthened
    # (within max_interval_ps), so the suggestion does not contradict its own warning
    rate_steps = int(math.ceil(height / _FAST_RATE_KJ_MOL_PS * 1000.0 / dt_fs * (1.0 - 1e-12)))
    if cap is not None:
        rate_steps = min(rate_steps, max(1, int(math.floor(cap * 1000.0 / dt_fs * (1.0 + 1e-12)))))
    rate_limited = rate_steps > steps
    if rate_limited:
        new_rate = height / (rate_steps * dt_fs / 1000.0)
        reached = _within_rate(new_rate)
        source = ("the autocorrelation time" if tau is not None else
                  "the 1 ps placeholder (no autocorrelation time)")
        why.append(
            f"Note: the interval from {source}, {steps} step"
            f"{'s' if steps > 1 else ''} ({steps * dt_fs / 1000.0:.3g} ps), would grow the bias "
            f"at {height / (steps * dt_fs / 1000.0):.3g} kJ/mol per ps at first; it is "
            f"lengthened to {rate_steps} steps ({rate_steps * dt_fs / 1000.0:.3g} ps), "
            + (f"a rate of {new_rate:.3g} kJ/mol/ps at the initial height, at most "
               f"{_FAST_RATE_KJ_MOL_PS:g}, the fastest the hints accept without a warning"
               if reached else
               f"as far as max_interval_ps = {cap:g} ps allows: a rate of {new_rate:.3g} "
               f"kJ/mol/ps at the initial height, still above the "
               f"{_FAST_RATE_KJ_MOL_PS:g} the hints accept without a warning")
            + f": faster, motions slower than the CV lag behind the bias. Common practice is "
            f"nearer 1 kJ/mol/ps ({tag_cpm}), about "
            f"{max(1, round(height * 1000.0 / dt_fs)):d} steps here: a bias that fills "
            f"{new_rate:.2g} times more slowly, with a smaller error (the error grows with "
            f"height / interval; Laio et al. 2005, from memory); choose it when the budget "
            f"allows.")
        steps = rate_steps
    interval_ps = steps * dt_fs / 1000.0
    if tau is not None and tau_interval is not None and \
            tau_interval[1] > POOR_TIME_RATIO * tau_interval[0]:
        text = (f"autocorrelation_time_ps = {tau:.4g} ps is poorly determined: its 95 % interval "
                f"[{tau_interval[0]:.3g}, {tau_interval[1]:.3g}] ps spans more than a factor "
                f"of {POOR_TIME_RATIO:g} (too few frames or runs per state to measure it)"
                + ("" if capped or rate_limited else
                   ", and so may the deposition interval sized from it")
                + "; longer or more runs per state measure it, or give a time of your own")
        why.append("Note: " + text + ".")
        warnings.append(text)
    if steps < _FEW_STEPS:
        why_few = (
            f"which is what a rate of {_FAST_RATE_KJ_MOL_PS:g} kJ/mol per ps allows at the "
            f"small initial height of {height:.3g} kJ/mol (the CV's time gave fewer); raise "
            "height_kt, or choose the interval yourself"
            if rate_limited and _within_rate(height / interval_ps) else
            f"as far as max_interval_ps = {cap:g} ps lets the interval grow; raise it, or "
            "choose the interval yourself"
            if rate_limited else
            f"because the autocorrelation time {tau_used:.3g} ps is only "
            f"{tau_used * 1000.0 / dt_fs:.3g} MD steps of {dt_fs:g} fs; check "
            "autocorrelation_time_ps and the MD step, or choose the interval yourself")
        warnings.append(
            f"the deposition interval is {steps} MD step{'s' if steps > 1 else ''} "
            f"({interval_ps:.3g} ps): a kernel {'every step' if steps == 1 else 'this often'} "
            f"is far more often than usual (every 100-1000 steps), {why_few}")
    rate = height / interval_ps
    if rate > _FAST_RATE_KJ_MOL_PS:
        warnings.append(
            f"the bias grows at {rate:.3g} kJ/mol per ps at first ({height:.3g} kJ/mol every "
            f"{interval_ps:.3g} ps), faster than the usual rate of about 1 kJ/mol/ps (common "
            "practice, from memory): motions slower than the CV lag behind such a bias; "
            f"consider a longer interval (about {max(1, round(height * 1000.0 / dt_fs)):d} "
            "steps for 1 kJ/mol/ps) or a smaller height")

    # well-tempered bias factor ----------------------------------------------
    def wt_row(dg, gamma):
        return {"barrier_kj_mol": dg, "bias_factor": gamma, "delta_t_k": (gamma - 1.0) * temperature,
                "effective_barrier_kj_mol": dg / gamma}

    table = [wt_row(dg, bias_factor_for_barrier(dg, temperature, target_barrier_kt=n_target))
             for dg in levels]
    wt_barrier = None if barriers is None else max(barriers.values())
    if gamma_user is not None:
        gamma = gamma_user
        why.append(f"Bias factor: {gamma:.4g}, as given (bias_factor).")
    elif wt_barrier is not None:
        gamma = bias_factor_for_barrier(wt_barrier, temperature, target_barrier_kt=n_target)
    else:
        gamma = None
    rule = (
        f"In well-tempered metadynamics (Barducci, Bussi and Parrinello, Phys. Rev. Lett. 100, "
        f"020603, 2008) the CV is sampled as at T + dT with gamma = (T + dT)/T, and a barrier "
        f"dG is seen reduced to dG/gamma [statement from memory]; gamma = dG / ({n_target:g} kT), "
        f"at least 2, leaves about {n_target:g} kT {tag_cpm}: 2-5 kT."
    )
    if gamma_user is None and gamma is not None:
        which = ("the barrier estimate" if len(set(barriers.values())) == 1
                 else "the largest barrier estimate")
        why.append(f"Bias factor: gamma = {gamma:.4g} for {which} "
                   f"{wt_barrier:.4g} kJ/mol (dT = {(gamma - 1) * temperature:.4g} K). " + rule)
    elif gamma is None:
        why.append("Bias factor: no barrier estimate given, so gamma is tabulated over barrier "
                   f"estimates {', '.join(f'{v:g}' for v in levels)} kJ/mol. " + rule)
    if gamma_user is None and wt_barrier is not None and wt_barrier / (n_target * kt) < 2.0:
        why.append(f"Note: the barrier estimate {wt_barrier:.4g} kJ/mol is below {2 * n_target:g} kT; "
                   f"gamma was raised to the floor of 2. A barrier this low may need little or "
                   f"no bias along this CV; check that the states really are metastable.")
    if gamma is not None and wt_barrier is not None and wt_barrier / gamma > n_target * kt * 1.0001:
        why.append(f"Note: with gamma = {gamma:.4g} the barrier of {wt_barrier:.4g} kJ/mol is seen "
                   f"as {wt_barrier / gamma:.4g} kJ/mol ({wt_barrier / gamma / kt:.3g} kT).")
    well_tempered = {
        "bias_factor": gamma,
        "delta_t_k": None if gamma is None else (gamma - 1.0) * temperature,
        "barrier_kj_mol": wt_barrier,
        "effective_barrier_kj_mol": None if gamma is None or wt_barrier is None else wt_barrier / gamma,
        "target_barrier_kt": n_target,
        "table": table,
    }

    # walls and grid ---------------------------------------------------------
    lows = [v["mean"] - wall_k * v["std"] for v in st.values()]
    highs = [v["mean"] + wall_k * v["std"] for v in st.values()]
    reach = 5.0 * sigma if kernel == "gaussian" else cutoff
    margin = reach + sigma
    spacing_max = f_grid * sigma
    covers = False
    if periodic:
        walls = None
        g_lo, g_hi = lo_range, hi_range
        covers = True
        why.append(f"Walls: none, the CV is periodic; the grid spans one period "
                   f"[{g_lo:.4g}, {g_hi:.4g}], the interval its values run over.")
    elif conf is not None:
        walls, g_lo, g_hi = _confined_walls_and_grid(
            why, conf, min(lows), max(highs), wall_k,
            (None, None) if cv_range is None else (lo_range, hi_range), (lo_seen, hi_seen),
            margin, kernel)
    else:
        walls, g_lo, g_hi, covers = _walls_and_grid(
            why, min(lows), max(highs), wall_k,
            None if cv_range is None else (lo_range, hi_range), (lo_seen, hi_seen),
            margin, spacing_max, n_grid_max, kernel)
    n_exact = (g_hi - g_lo) / (f_grid * sigma)
    if not n_exact - 1e-9 <= n_grid_max:
        raise InputError(
            f"the grid would need about {n_exact:.3g} bins ([{g_lo:.4g}, {g_hi:.4g}] at a "
            f"spacing of {f_grid:g} x sigma = {f_grid * sigma:.3g} CV units), more than "
            f"max_grid_bins={n_grid_max}: the narrowest state ({ref_state!r}, std {ref_std:.3g}) "
            f"is {(g_hi - g_lo) / ref_std:.3g} times narrower than the range to explore, so "
            "kernels of its width would take very long to fill it. Choose a CV whose states "
            "have comparable spreads; or, in Python (suggest_hints, spec_hints), give a "
            "narrower cv_range, a larger width_fraction or grid_fraction, or a larger "
            "max_grid_bins if such a grid is what you want")
    n_bins = max(1, int(math.ceil(n_exact - 1e-9)))
    spacing = (g_hi - g_lo) / n_bins
    why.append(
        f"Grid spacing: at most {f_grid:g} x sigma = {f_grid * sigma:.4g} CV units {tag_cpm}: "
        f"several points per kernel width keep interpolation errors of the bias and its force "
        f"small; {n_bins} bins of {spacing:.4g} over [{g_lo:.4g}, {g_hi:.4g}]."
    )
    grid = {"lower": g_lo, "upper": g_hi, "spacing": spacing, "n_bins": n_bins,
            "n_points": n_bins if periodic else n_bins + 1, "periodic": bool(periodic),
            "covers_reachable": covers}
    if conf is not None:
        grid["covers_restraint"] = True

    # fill times -------------------------------------------------------------
    model = (
        "Each state is a harmonic basin F(s) = kT (s - mean)^2 / (2 std^2) (std from the input "
        "data, which are taken to be at the temperature given: runs made at another "
        "temperature T_data have the curvature kT_data / std^2, and their fill volumes are "
        "sqrt(T / T_data) times the model's). Plain metadynamics: time to deposit the bias volume (4/3) std L sqrt(2L/kT) "
        "that makes the basin flat up to level L, one kernel of volume height x area per "
        "interval (quasi-static filling; Laio and Parrinello, Proc. Natl. Acad. Sci. USA 99, "
        "12562, 2002, from memory). Well-tempered: the bias keeps the converged shape "
        "(1 - 1/gamma)(L - F)_+ of Barducci, Bussi and Parrinello (2008) while L rises; the "
        "walker is Boltzmann-distributed on F + V and the kernel height decays as "
        "height x exp(-V/(kB dT)); the rate is integrated numerically up to L = barrier, when "
        "the barrier is seen as barrier/gamma [our model]. Order-of-magnitude estimates: real "
        "basins are not harmonic and a 1-D CV misses slow orthogonal motions."
    )
    rows_of = {}
    over = []
    for name, v in fit.items():
        todo = [(barriers[name], gamma)] if barriers is not None else [
            (dg, gamma_user if gamma_user is not None else row["bias_factor"]) for dg, row in zip(levels, table)]
        rows = []
        for dg, g in todo:
            vol = fill_volume(dg, v["std"], temperature)
            t_md = fill_time_metadynamics(dg, v["std"], temperature=temperature, height=height,
                                          area_per_height=area, interval_ps=interval_ps)
            t_wt = None if g is None else fill_time_well_tempered(
                dg, v["std"], temperature=temperature, height=height, area_per_height=area,
                interval_ps=interval_ps, bias_factor=g)
            t_wt = _finite_or_none(t_wt)
            worst = t_wt if g is not None else t_md
            flag = None if budget is None else (worst is None or worst / 1000.0 > budget)
            if flag:
                over.append(f"{name} ({dg:g} kJ/mol)")
            rows.append({
                "level_kj_mol": dg, "bias_factor": g, "volume": vol,
                "n_kernels": vol / (height * area),
                "metadynamics_ps": t_md, "metadynamics_ns": t_md / 1000.0,
                "well_tempered_ps": t_wt, "well_tempered_ns": None if t_wt is None else t_wt / 1000.0,
                "over_budget": flag,
            })
        rows_of[name] = rows
    why.append(
        "Fill time per state: harmonic-basin model with the state's std, volume "
        "(4/3) std L sqrt(2L/kT) [derived here], kernels of the height, width and interval "
        "above; well-tempered times from the numerically integrated model in fill_time "
        "[our model]. A deep or wide basin takes longer (time ~ std x L^1.5 for plain "
        "metadynamics)."
    )
    if conf is not None:
        why.append(conf["fill_note"])
    if budget is not None:
        if over:
            why.append(f"Over the budget of {budget:g} ns: {', '.join(over)}; consider a larger "
                       f"height, a wider kernel, a larger bias factor, or several walkers.")
        else:
            why.append(f"Every estimated fill time is within the budget of {budget:g} ns.")

    return {
        "format": HINTS_FORMAT,
        "version": HINTS_VERSION,
        "caution": CAUTION,
        "warnings": warnings,
        "units": {"cv": "CV units", "energy": "kJ/mol", "time": "ps", "md_step": "fs",
                  "temperature": "K"},
        "inputs": {
            "temperature_k": temperature, "md_step_fs": dt_fs, "kt_kj_mol": kt,
            "autocorrelation_time_ps": tau,
            "frame_spacing_ps": frame_ps,
            "autocorrelation_time_decayed": (None if autocorrelation_time_decayed is None
                                             else bool(autocorrelation_time_decayed)),
            "autocorrelation_time_interval_ps": tau_interval,
            "barrier_kj_mol": (None if barriers is None else
                               (barriers if isinstance(barrier, Mapping) else float(barrier))),
            "states": st,
            "cv_range": None if cv_range is None else [lo_range, hi_range],
            "observed_range": None if observed_range is None else [lo_seen, hi_seen],
        },
        "kernel": {"kind": kernel, "sigma": sigma, "cutoff": cutoff, "area_per_height": area,
                   "width_fraction": f_width, "reference_state": ref_state, "reference_std": ref_std},
        "height_kj_mol": height,
        "deposition": {"interval_steps": steps, "interval_ps": interval_ps, "tau_ps": tau_used,
                       "capped": capped, "tau_resolved": resolved, "tau_lower_bound": lower_bound,
                       "rate_kj_mol_ps": rate, "rate_limited": rate_limited},
        "well_tempered": well_tempered,
        "walls": walls,
        "grid": grid,
        "fill_time": {"model": model, "budget_ns": budget, "states": rows_of,
                      **({} if conf is None else {"note": conf["fill_note"]})},
        "reasoning": why,
        "sources": [_SOURCES[k] for k in ("lucy", "wt", "metad", "accuracy")]
                   + ["common practice (rules labelled so in the reasoning)"],
    }


def _walls_and_grid(why, w_lo, w_hi, wall_k, cv_range, observed, margin, spacing, max_bins,
                    kernel):
    """Walls, grid ends and whether the grid spans the reachable range, for a CV that is not
    periodic; appends the reasoning to `why`.

    Walls stand at the outermost state mean -/+ wall_k std, except at or beyond a reachable
    end. A CV bounded on both sides gets a grid over its whole reachable range (unless that
    takes more than `max_bins` bins at `spacing`); otherwise the grid covers the walls and
    the observed range plus `margin`, clipped to a reachable end.
    """
    tag_cp = "[common practice]"
    lo_r, hi_r = (None, None) if cv_range is None else cv_range
    lo_seen, hi_seen = observed
    wall_lo = None if lo_r is not None and w_lo <= lo_r else w_lo
    wall_hi = None if hi_r is not None and w_hi >= hi_r else w_hi
    walls = {"lower": wall_lo, "upper": wall_hi, "k_std": wall_k}
    text = (f"Walls at the outermost state mean -/+ {wall_k:g} std: [{w_lo:.4g}, {w_hi:.4g}] CV "
            f"units {tag_cp}: +/-3 std holds 99.7% of a Gaussian basin, so the bias explores "
            f"the observed states and the region between them, not far beyond.")
    dropped = []
    if wall_lo is None:
        dropped.append(f"no lower wall, since {w_lo:.4g} is at or below {lo_r:.4g}, the lowest "
                       "value the CV can reach")
    if wall_hi is None:
        dropped.append(f"no upper wall, since {w_hi:.4g} is at or above {hi_r:.4g}, the "
                       "highest value the CV can reach")
    if dropped:
        joined = "; ".join(dropped)
        text += (f" {joined[0].upper()}{joined[1:]} (from its terms): the CV cannot pass "
                 "that end, so a wall there would do nothing.")
    why.append(text)

    core_lo, core_hi = w_lo, w_hi
    seen_text = ""
    if lo_seen is not None:
        core_lo, core_hi = min(core_lo, lo_seen), max(core_hi, hi_seen)
        seen_text = f" and the observed range [{lo_seen:.4g}, {hi_seen:.4g}]"
    covered = f"walls{seen_text}, extended by {_margin_text(kernel, margin)}"
    keep = ("Keep the walls: beyond its grid a tabulated bias gives no force, and the CV "
            "could wander there unbiased.")
    g_lo, g_hi = core_lo - margin, core_hi + margin
    if lo_r is not None and hi_r is not None:
        n_reach = (hi_r - lo_r) / spacing
        if n_reach - 1e-9 <= max_bins:
            why.append(
                f"Grid: the CV is bounded, it can reach only [{lo_r:.4g}, {hi_r:.4g}] (from "
                "its terms), and the grid spans all of it, so the bias is defined wherever the "
                "CV can go (a tabulated bias outside its grid gives no force) [derived from "
                "the terms].")
            return walls, lo_r, hi_r, True
        why.append(
            f"Grid: the CV is bounded ([{lo_r:.4g}, {hi_r:.4g}] from its terms), but a grid "
            f"over all of it would need about {n_reach:.3g} bins at this spacing, more than "
            f"max_grid_bins={max_bins}; it covers the {covered}, clipped to the reachable "
            f"range. {keep}")
        return walls, max(g_lo, lo_r), min(g_hi, hi_r), False
    if lo_r is None and hi_r is None:
        side = ("no reachable range was given" if cv_range is None
                else "the CV is unbounded in both directions")
    else:
        side = (f"the CV is unbounded {'below' if lo_r is None else 'above'} (its reachable "
                f"range is [{'-inf' if lo_r is None else format(lo_r, '.4g')}, "
                f"{'+inf' if hi_r is None else format(hi_r, '.4g')}], from its terms: e.g. a "
                "distance has no largest value)")
    g_lo, g_hi, clip = _clip_grid(g_lo, g_hi, lo_r, hi_r)
    why.append(f"Grid: {side}, so no grid spans every value the CV can take; it covers the "
               f"{covered}{clip}. {keep}")
    return walls, g_lo, g_hi, False


def _clip_grid(g_lo, g_hi, lo_r, hi_r):
    """Grid ends clipped to the reachable ends (None: unbounded there), and the reasoning's
    words for it (empty when nothing was clipped)."""
    clipped = []
    if lo_r is not None and g_lo < lo_r:
        g_lo = lo_r
        clipped.append("lower")
    if hi_r is not None and g_hi > hi_r:
        g_hi = hi_r
        clipped.append("upper")
    clip = f", clipped to the reachable {' and '.join(clipped)} end" if clipped else ""
    return g_lo, g_hi, clip


def _margin_text(kernel, margin):
    """The reasoning's words for the grid's margin beyond the region it must cover."""
    reach = ("5 sigma (where a Gaussian kernel is below 4e-6 of its peak)"
             if kernel == "gaussian" else "the Lucy cutoff h (exact support)")
    return (f"{reach} plus 1 sigma for the walker's overshoot past a wall = {margin:.4g} CV "
            "units on each side [common practice], so kernels deposited near a wall stay on "
            "the grid")


_CONFINEMENT_TEXTS = ("walls", "reasoning", "fill_note")


def _confinement(confinement, periodic):
    """The `confinement` of :func:`suggest_hints`, checked (None stays None)."""
    if confinement is None:
        return None
    if periodic:
        raise InputError("confinement goes with a CV that is not periodic (a periodic CV has "
                         "no walls to replace)")
    if not isinstance(confinement, Mapping):
        raise InputError(f"confinement must be a dict with id, lower, upper, "
                         f"{', '.join(_CONFINEMENT_TEXTS)}; got {confinement!r}")
    missing = [k for k in ("id", "lower", "upper") + _CONFINEMENT_TEXTS if k not in confinement]
    if missing:
        raise InputError(f"confinement lacks {', '.join(missing)}")
    conf = dict(confinement)
    for key in ("id",) + _CONFINEMENT_TEXTS:
        if not isinstance(conf[key], str):
            raise InputError(f"confinement[{key!r}] must be a string; got {conf[key]!r}")
    conf["lower"] = _number("confinement['lower']", conf["lower"], positive=False)
    conf["upper"] = _number("confinement['upper']", conf["upper"], positive=False)
    if not conf["upper"] > conf["lower"]:
        raise InputError(f"confinement range [{conf['lower']!r}, {conf['upper']!r}] must have "
                         "lower < upper")
    return conf


def _confined_walls_and_grid(why, conf, w_lo, w_hi, wall_k, cv_range, observed, margin,
                             kernel):
    """Walls and grid ends for a CV confined by a restraint (`conf`, see
    :func:`suggest_hints`); appends the reasoning to `why`.

    No wall on the CV: the restraint's walls confine it. The grid covers the
    restraint's range, the states' mean -/+ wall_k std (`w_lo`, `w_hi`) and the
    observed range, plus `margin`, clipped to a reachable end.
    """
    lo_r, hi_r = cv_range
    lo_seen, hi_seen = observed
    core_lo, core_hi = min(conf["lower"], w_lo), max(conf["upper"], w_hi)
    if lo_seen is not None:
        core_lo, core_hi = min(core_lo, lo_seen), max(core_hi, hi_seen)
    g_lo, g_hi = core_lo - margin, core_hi + margin
    g_lo, g_hi, clip = _clip_grid(g_lo, g_hi, lo_r, hi_r)
    why.append(conf["reasoning"])
    why.append(
        f"Walls: none on the CV; restraint {conf['id']!r} confines it ({conf['walls']}). Walls "
        f"at the outermost state mean -/+ {wall_k:g} std, [{w_lo:.4g}, {w_hi:.4g}], would "
        "hold the system inside the states the spec records, which the restraint is there "
        "to let it leave.")
    why.append(
        f"Grid: covers [{conf['lower']:.4g}, {conf['upper']:.4g}], every value restraint "
        f"{conf['id']!r} allows, extended by {_margin_text(kernel, margin)}{clip}; a "
        "tabulated bias gives no force beyond its grid.")
    walls = {"lower": None, "upper": None, "k_std": None, "restraint": conf["id"],
             "restraint_walls": conf["walls"]}
    return walls, g_lo, g_hi


# --------------------------------------------------------------------------
# text


def _g(x, digits=4):
    return "-" if x is None else f"{x:.{digits}g}"


def _wall(x):
    return "none (at or beyond the reachable end)" if x is None else _g(x)


def _end(x, unbounded):
    return f"{unbounded} (unbounded)" if x is None else _g(x)


def _time(ps):
    if ps is None:
        return "beyond estimate"
    return f"{ps:.3g} ps" if ps < 1000.0 else f"{ps / 1000.0:.3g} ns"


def spec_hints(spec, *, temperature, md_step_fs, barrier=None, kernel="gaussian", **options):
    """:func:`suggest_hints` from what a spec records, for a given simulation.

    The states' mean and spread come from ``spec.states`` (a state without a
    resolvable spread is left out of the kernel width and the fill times,
    with a warning: ``leave_out_frozen=True``), the deposition interval from
    ``spec.scores["integrated_time_ps"]`` when recorded (with
    ``scores["frame_spacing_ps"]`` and ``scores["integrated_time_decayed"]``, 1 or
    0, when recorded: whether the frames resolved it, whether it is a lower
    bound), and the grid and
    walls from the CV's reachable range (:attr:`cvdesign.Spec.reachable_range`,
    computed from the terms for a spec written without one) and observed
    range (:attr:`cvdesign.Spec.observed_range`, when recorded): a bounded CV's
    grid spans its whole reachable range, a periodic CV's grid the period its
    values run over, and no wall stands at or beyond a reachable end.

    A funnel restraint (``spec.restraints``, as ``cvdesign funnel`` writes)
    whose two groups are those of the CV, the distance between their
    geometric centres (one identity term), confines the CV: no wall is put on
    the CV, and the grid spans every value the funnel allows, from its lower
    wall (0 when that lies below the pocket centre) to its reach
    (:func:`cvdesign.bias.funnel.funnel_reach`), in the CV's units (the
    ``confinement`` of :func:`suggest_hints`); the reasoning says so, and what
    the fill times mean then (the time to leave a state, e.g. the first
    unbinding, not to converge a binding free energy). A funnel on other
    groups gets a warning, and the walls come from the states.

    Parameters
    ----------
    spec : cvdesign.Spec
        The CV (e.g. from :func:`cvdesign.load_spec`).
    temperature : float
        Simulation temperature, K.
    md_step_fs : float
        MD step of the biased run, fs.
    barrier : float or dict, optional
        Barrier estimate, kJ/mol (see :func:`suggest_hints`).
    kernel : {'gaussian', 'lucy'}, default='gaussian'
    **options
        Further keyword arguments of :func:`suggest_hints` (e.g.
        ``bias_factor``, ``width_fraction``).

    Returns
    -------
    dict
        As :func:`suggest_hints`.

    Raises
    ------
    InputError
        The spec records no state with a resolvable spread, and the other
        refusals of :func:`suggest_hints`.

    Examples
    --------
    >>> import mdtraj as md
    >>> from cvdesign import Spec
    >>> top = md.Topology()
    >>> res = top.add_residue("X", top.add_chain(), resSeq=1)
    >>> _ = [top.add_atom(n, md.element.carbon, res) for n in ("A", "B")]
    >>> spec = Spec(name="d", topology=top,
    ...             descriptors=[{"id": "d", "kind": "distance", "atoms": [0, 1]}],
    ...             terms=[{"descriptor": "d", "transform": "identity", "center": 1.5,
    ...                     "scale": 1.0, "weight": 1.0}],
    ...             states={"a": {"mean": -1.0, "std": 0.1, "n_frames": 100},
    ...                     "b": {"mean": 1.0, "std": 0.2, "n_frames": 100}})
    >>> h = spec_hints(spec, temperature=300.0, md_step_fs=2.0, barrier=30.0)
    >>> round(h["kernel"]["sigma"], 3)  # half the smallest spread
    0.05
    >>> h["grid"]["covers_reachable"]  # a distance has no largest value
    False

    The cos and sin of one dihedral: bounded, so the grid spans the whole range.

    >>> top = md.Topology()
    >>> res = top.add_residue("X", top.add_chain(), resSeq=1)
    >>> _ = [top.add_atom(n, md.element.carbon, res) for n in ("A", "B", "C", "D")]
    >>> spec = Spec(name="c", topology=top,
    ...             descriptors=[{"id": "phi", "kind": "dihedral", "atoms": [0, 1, 2, 3]}],
    ...             terms=[{"descriptor": "phi", "transform": t, "center": 0.0,
    ...                     "scale": 1.0, "weight": w} for t, w in (("cos", 0.6), ("sin", 0.8))],
    ...             states={"a": {"mean": -0.5, "std": 0.1, "n_frames": 100},
    ...                     "b": {"mean": 0.5, "std": 0.2, "n_frames": 100}})
    >>> h = spec_hints(spec, temperature=300.0, md_step_fs=2.0, barrier=30.0)
    >>> round(h["grid"]["lower"], 9), round(h["grid"]["upper"], 9), h["grid"]["covers_reachable"]
    (-1.0, 1.0, True)
    """
    if not spec.states:
        raise InputError(f"spec {spec.name!r} records no states; hints need the CV's mean "
                         "and within-state spread in each state")
    given = options.pop("autocorrelation_time_ps", None)
    if given is not None:  # a time of the user's: the spec's spacing, flag, interval are not its
        options.setdefault("frame_spacing_ps", None)
        options.setdefault("autocorrelation_time_decayed", None)
        options.setdefault("autocorrelation_time_interval_ps", None)
    _check_spec_times(spec, options)
    options.setdefault("leave_out_frozen", True)
    options.setdefault("cv_range", spec.reachable_range)
    options.setdefault("observed_range", spec.observed_range)
    options.setdefault("frame_spacing_ps", spec.scores.get("frame_spacing_ps"))
    decayed = spec.scores.get("integrated_time_decayed")
    options.setdefault("autocorrelation_time_decayed", None if decayed is None else
                       bool(decayed))
    interval = spec.scores.get("integrated_time_ci_ps")  # checked when the spec was made
    options.setdefault("autocorrelation_time_interval_ps",
                       None if interval is None else tuple(interval))
    options.setdefault("from_biased_runs", any(
        isinstance(seg, Mapping) and seg.get("bias") is not None
        for seg in (spec.provenance.get("segments") or [])))
    confinement, unused = _funnel_confinement(spec)
    if confinement is not None:
        options.setdefault("confinement", confinement)
    hints = suggest_hints(spec.states, temperature=temperature, md_step_fs=md_step_fs,
                          autocorrelation_time_ps=(spec.scores.get("integrated_time_ps")
                                                   if given is None else given),
                          barrier=barrier, kernel=kernel, periodic=bool(spec.periodic),
                          **options)
    hints["warnings"] += unused
    return hints


def _check_spec_times(spec, options):
    """Refuse a time among the spec's scores that :func:`suggest_hints` would refuse, naming
    the spec's key and file rather than the parameter it is passed as."""
    file = getattr(spec, "_file", None)
    where = f"spec file {str(file)!r}" if file else f"spec {spec.name!r}"
    for key, parameter, meaning in (
            ("integrated_time_ps", "autocorrelation_time_ps",
             "the CV's integrated autocorrelation time, which sets the deposition interval"),
            ("frame_spacing_ps", "frame_spacing_ps",
             "the time between the frames that time was measured on")):
        value = spec.scores.get(key)
        if value is None or parameter in options:  # (absent, or replaced by the caller's)
            continue
        try:
            _number(parameter, value)
        except InputError:
            raise InputError(
                f"$.scores.{key} of {where} is {value!r}: it must be a positive number of ps "
                f"({meaning}); correct it, or remove the key to size the hints without "
                "it") from None


def _funnel_confinement(spec):
    """The :func:`suggest_hints` `confinement` of the spec's funnel restraint, when its CV
    is the distance between the restraint's group centres; and warnings for the funnels
    whose CV is not (the hints then cannot take walls or grid from them)."""
    funnels = [r for r in spec.restraints if r["kind"] == "funnel"]
    if not funnels:
        return None, []
    terms, descriptors = spec.terms, {d["id"]: d for d in spec.descriptors}
    desc = descriptors[terms[0]["descriptor"]] if len(terms) == 1 else None
    groups = None
    if (desc is not None and desc["kind"] == "center_distance"
            and desc.get("weighting", "geometric") == "geometric"
            and terms[0]["transform"] == "identity"):
        groups = sorted(sorted(g) for g in desc["groups"])
    match = [r for r in funnels if groups is not None
             and sorted(sorted(g) for g in r["groups"]) == groups]
    unused = [
        f"the spec carries the funnel restraint {r['id']!r}, but its CV is not the distance "
        "between the geometric centres of the restraint's two groups, so the walls and grid "
        "cannot be taken from the funnel and come from the states' spreads: check that they "
        "do not hold the ligand in the pocket, and set them over the funnel's extent "
        f"(lower_wall_z_nm {r['lower_wall_z_nm']:.4g} to upper_wall_z_nm "
        f"{r['upper_wall_z_nm']:.4g} nm along its axis) in the CV's units yourself"
        for r in funnels if r not in match]
    if not match:
        return None, unused
    from .funnel import funnel_radius, funnel_reach

    res = match[0]
    z_lo, z_hi = res["lower_wall_z_nm"], res["upper_wall_z_nm"]
    reach, where = funnel_reach(res)
    # The nearest point of the funnel to the pocket centre lies on its axis.
    if z_lo <= 0.0 <= z_hi:
        near, near_text = 0.0, (f"from 0 (the lower wall, at z = {z_lo:.4g} nm, lies below "
                                "the pocket centre)")
    elif z_lo > 0.0:
        near, near_text = z_lo, f"from {z_lo:.4g} nm (its lower wall, on the axis)"
    else:
        near, near_text = -z_hi, f"from {-z_hi:.4g} nm (its upper wall, on the axis)"
    term = terms[0]
    ends = [spec.offset + term["weight"] * (v - term["center"]) / term["scale"]
            for v in (near, reach)]
    lower, upper = min(ends), max(ends)
    unit = "nm" if (term["weight"], term["center"], term["scale"]) == (1.0, 0.0, 1.0) \
        and spec.offset == 0.0 else "nm before the CV's scaling"
    radius = float(funnel_radius([z_hi], res)[0][0])
    return {
        "id": res["id"], "lower": lower, "upper": upper,
        "walls": (f"its walls at z = {z_lo:.4g} and {z_hi:.4g} nm along its axis from the "
                  f"pocket centre, its cone and its cylinder of radius {radius:.4g} nm"),
        "reasoning": (
            f"Restraint {res['id']!r}, a funnel, holds the ligand centre within a cone and "
            f"cylinder; the CV, the distance between the pocket and ligand centres, can take "
            f"inside it the values {near_text} up to {reach:.4g} {unit}, the funnel's reach "
            f"(its farthest point from the pocket centre, on the rim of its {where}) [derived "
            f"from the restraint]: [{lower:.4g}, {upper:.4g}] CV units."),
        "fill_note": (
            "Fill times with a funnel: each state's row is the time to fill that state's "
            "basin, modelled as harmonic with the spread of its frames, up to the barrier "
            "estimate: roughly the time until the ligand first leaves it (for the bound "
            "state, the first unbinding). It is not the time to a converged binding free "
            "energy, which takes many unbinding and rebinding events across the funnel's "
            "cylinder; the frames of the spec say nothing of the free energy beyond their "
            "basins, so no estimate of that is given. The barrier estimate, and with it the "
            "bias factor, is the free energy of the ligand out in the funnel's cylinder "
            "above the bound basin plus any barrier on the way out; the bound frames do not "
            "measure it: take it from an estimate of the binding free energy, and expect "
            "to raise the bias factor if the ligand has not come back within the run [our "
            "model]."),
    }, unused


def format_hints(hints):
    """Human-readable text of a :func:`suggest_hints` result.

    Parameters
    ----------
    hints : dict
        A dict returned by :func:`suggest_hints` (or its JSON round trip).

    Returns
    -------
    str
        Multi-line text: the caution, the suggested values with units, the
        fill-time table per state, the reasoning, the sources, and the caution
        again.

    Examples
    --------
    >>> h = suggest_hints({"A": {"mean": 0.0, "std": 0.1}}, temperature=300.0,
    ...                   md_step_fs=2.0, barrier=30.0)
    >>> text = format_hints(h)
    >>> "starting points to validate" in text, "Fill time" in text
    (True, True)
    """
    if not isinstance(hints, Mapping) or hints.get("format") != HINTS_FORMAT:
        raise InputError("hints must be a dict returned by suggest_hints")
    k, dep, wt = hints["kernel"], hints["deposition"], hints["well_tempered"]
    inp = hints["inputs"]
    out = ["Bias hints (cvdesign)", "CAUTION: " + hints["caution"], ""]
    warnings = hints.get("warnings") or []
    out += [f"WARNING: {w}" for w in warnings] + ([""] if warnings else [])
    out.append(f"temperature {inp['temperature_k']:g} K (kT = {inp['kt_kj_mol']:.4g} kJ/mol), "
               f"MD step {inp['md_step_fs']:g} fs")
    if k["kind"] == "gaussian":
        out.append(f"kernel           Gaussian, sigma = {_g(k['sigma'])} CV units")
    else:
        out.append(f"kernel           Lucy, cutoff h = {_g(k['cutoff'])} CV units "
                   f"(variance of a Gaussian with sigma = {_g(k['sigma'])})")
    out.append(f"height           {_g(hints['height_kj_mol'])} kJ/mol (initial)")
    out.append(f"interval         {dep['interval_steps']} steps = {_g(dep['interval_ps'])} ps"
               + (" (capped)" if dep["capped"] else "")
               + ((" (lengthened: at most "
                   f"{_g(_FAST_RATE_KJ_MOL_PS)} kJ/mol per ps at first)"
                   if _within_rate(dep["rate_kj_mol_ps"]) else
                   f" (lengthened toward {_g(_FAST_RATE_KJ_MOL_PS)} kJ/mol per ps, stopped "
                   "by max_interval_ps)")
                  if dep.get("rate_limited") else ""))
    if wt["bias_factor"] is not None:
        line = f"bias factor      {_g(wt['bias_factor'])} (dT = {_g(wt['delta_t_k'])} K)"
        if wt["barrier_kj_mol"] is not None:
            line += (f"; barrier {_g(wt['barrier_kj_mol'])} kJ/mol seen as "
                     f"{_g(wt['effective_barrier_kj_mol'])} kJ/mol")
        out.append(line)
    if wt["barrier_kj_mol"] is None:
        out.append("bias factor by barrier estimate:")
        out.append("  barrier (kJ/mol)  bias factor  dT (K)  barrier seen (kJ/mol)")
        for r in wt["table"]:
            out.append(f"  {r['barrier_kj_mol']:>16g}  {r['bias_factor']:>11.3g}  "
                       f"{r['delta_t_k']:>6.0f}  {r['effective_barrier_kj_mol']:>21.3g}")
    walls = hints["walls"]
    if walls is None:
        out.append("walls            none (periodic CV)")
    elif walls.get("restraint") is not None:
        out.append(f"walls            none on the CV: restraint {walls['restraint']!r} confines "
                   f"it ({walls['restraint_walls']})")
    elif walls["lower"] is None and walls["upper"] is None:
        out.append("walls            none needed (both would stand at or beyond the CV's "
                   "reachable ends)")
    else:
        out.append(f"walls            lower {_wall(walls['lower'])}, upper "
                   f"{_wall(walls['upper'])} (CV units)")
    gr = hints["grid"]
    covers = gr.get("covers_reachable")
    out.append(f"grid             [{_g(gr['lower'])}, {_g(gr['upper'])}], {gr['n_bins']} bins "
               f"of {_g(gr['spacing'])}" + (" (periodic)" if gr["periodic"] else "")
               + ("; spans every value the CV can reach" if covers else
                  f"; spans every value restraint {walls['restraint']!r} allows"
                  if gr.get("covers_restraint") else
                  "; does NOT span every value the CV can reach (see the reasoning)"
                  if covers is False else ""))
    reach, seen = inp.get("cv_range"), inp.get("observed_range")
    if reach is not None or seen is not None:
        out.append("CV range         reachable "
                   + ("not given" if reach is None else
                      f"[{_end(reach[0], '-inf')}, {_end(reach[1], '+inf')}]")
                   + ", observed " + ("not given" if seen is None else
                                      f"[{_g(seen[0])}, {_g(seen[1])}]"))
    note = hints["fill_time"].get("note")
    out += ["", "Fill time per state (harmonic-basin model; order of magnitude"
            + ("; the time to leave the state, e.g. the first unbinding, not to converge a "
               "binding free energy; see the reasoning):" if note else "):"),
            "  state            level (kJ/mol)  bias factor  metadynamics    well-tempered"]
    for name, rows in hints["fill_time"]["states"].items():
        for r in rows:
            flag = "  over budget" if r.get("over_budget") else ""
            gam = "-" if r["bias_factor"] is None else f"{r['bias_factor']:.3g}"
            wtt = "-" if r["bias_factor"] is None else _time(r["well_tempered_ps"])
            out.append(f"  {name:<16} {r['level_kj_mol']:>14g}  {gam:>11}  "
                       f"{_time(r['metadynamics_ps']):>12}  {wtt:>15}{flag}")
    out += ["", "Model: " + hints["fill_time"]["model"], "", "Reasoning:"]
    out += [f"- {line}" for line in hints["reasoning"]]
    out += ["", "Sources:"] + [f"- {s}" for s in hints["sources"]]
    out += ["", "CAUTION: " + hints["caution"]]
    return "\n".join(out) + "\n"
