"""Funnel-restraint sizing for a bound ligand, from bound-state frames.

A funnel restraint keeps a ligand inside a cone-plus-cylinder volume whose axis
runs from the binding pocket toward the solvent, so that biased sampling of
binding and unbinding explores a finite, well-defined volume. This module
finds the axis, measures the bound ligand's distribution along (z, nm) and
across (r, nm) the axis, recommends the funnel's size, and evaluates the
restraint's energy (kJ/mol) and gradient (kJ/mol/nm).

Geometry (all lengths nm, angles rad), with origin ``o`` (pocket centre) and
unit axis ``a``: ``z = (c - o) . a``, ``r = |(c - o) - z a|`` for the ligand
centre ``c``. The funnel radius is ``R(z) = r_cyl + tan(alpha) g(z)`` with
``g = z_cc - z`` below ``z_cc - w``, ``g = (z_cc + w - z)**2 / (4 w)`` within
``w`` of ``z_cc``, and ``g = 0`` beyond: a cone wide over the pocket that
narrows (as ``alpha``) into a cylinder of radius ``r_cyl`` in the solvent,
with a quadratic blend of half-width ``w`` that makes ``R`` and hence the
energy continuous with a continuous gradient (C1) at the junction.

Caution: every suggested value is a starting point to validate (check that
the bound pose is unperturbed with the restraint on, and that the cylinder
reaches bulk solvent), not a guarantee.
"""

import numpy as np

__all__ = ["CAUTION", "FunnelStats", "funnel_axis", "funnel_energy", "funnel_radius",
           "plot_funnel", "project_on_axis", "size_funnel"]

CAUTION = ("Suggested funnel parameters are starting points to validate (bound pose "
           "unperturbed with the restraint on, cylinder reaching bulk solvent), not "
           "guarantees.")


def _unit(v, name):
    v = np.asarray(v, dtype=np.float64)
    n = np.linalg.norm(v)
    if v.shape != (3,) or not n > 0:
        raise ValueError(f"{name} must be a non-zero 3-vector in nm; got {v!r}")
    return v / n


def funnel_axis(pocket_center, exit_point=None, ligand_centers=None, *, pocket_xyz=None,
                min_offset=0.05):
    """Unit axis from the pocket centre toward the solvent.

    Rule, in order: (1) through `exit_point` when given (exact); (2) through
    the mean ligand centre when it is at least `min_offset` nm from the pocket
    centre (ligands usually sit off-centre toward the mouth of a cavity, but
    not always: in a deep symmetric pocket this direction is noise); (3) the
    principal direction of smallest spread of the mean pocket structure
    `pocket_xyz` (the axis of a cup or ring), signed toward the mean ligand
    centre if given, else toward +z. Rule (3) fails for pockets that are not
    flat-ish or cup-shaped; give an exit point then (from memory, the usual
    choice is a point at the pocket mouth picked by eye).

    Parameters
    ----------
    pocket_center : array-like of shape (3,)
        nm.
    exit_point : array-like of shape (3,), optional
        A point toward the solvent, nm.
    ligand_centers : array-like of shape (n_frames, 3) or (3,), optional
        Ligand centres (or their mean), nm.
    pocket_xyz : array-like of shape (n_atoms, 3), optional
        Mean pocket structure, nm (for rule 3).
    min_offset : float, default=0.05
        nm.

    Returns
    -------
    axis : ndarray of shape (3,)
        Unit vector (dimensionless).
    rule : str
        ``'exit_point'``, ``'ligand_offset'`` or ``'pocket_shape'``.

    Examples
    --------
    >>> a, rule = funnel_axis([0, 0, 0], exit_point=[0, 0, 2.0])
    >>> a.tolist(), rule
    ([0.0, 0.0, 1.0], 'exit_point')
    """
    o = np.asarray(pocket_center, dtype=np.float64)
    if exit_point is not None:
        return _unit(np.asarray(exit_point, dtype=np.float64) - o, "exit_point - pocket_center"), \
            "exit_point"
    lig = None
    if ligand_centers is not None:
        lig = np.asarray(ligand_centers, dtype=np.float64).reshape(-1, 3).mean(axis=0)
        if np.linalg.norm(lig - o) >= min_offset:
            return _unit(lig - o, "ligand offset"), "ligand_offset"
    if pocket_xyz is None:
        raise ValueError("cannot define a funnel axis: the ligand sits within "
                         f"min_offset={min_offset} nm of the pocket centre; give exit_point "
                         "or pocket_xyz")
    p = np.asarray(pocket_xyz, dtype=np.float64)
    w, v = np.linalg.eigh(np.cov((p - p.mean(axis=0)).T))
    a = v[:, 0]
    ref = (lig - o) if lig is not None else np.array([0.0, 0.0, 1.0])
    if a @ ref < 0:
        a = -a
    return a, "pocket_shape"


def project_on_axis(points, origin, axis):
    """Axial and radial coordinates of points.

    Parameters
    ----------
    points : array-like of shape (..., 3)
        nm.
    origin : array-like of shape (3,) or (..., 3)
        nm.
    axis : array-like of shape (3,)
        Direction (normalized here).

    Returns
    -------
    z, r : ndarray of shape (...)
        nm.

    Examples
    --------
    >>> z, r = project_on_axis([[1.0, 3.0, 4.0]], [1.0, 0, 0], [1.0, 0, 0])
    >>> z.tolist(), r.tolist()
    ([0.0], [5.0])
    """
    a = _unit(axis, "axis")
    d = np.asarray(points, dtype=np.float64) - np.asarray(origin, dtype=np.float64)
    z = d @ a
    r = np.linalg.norm(d - z[..., None] * a, axis=-1)
    return z, r


class FunnelStats:
    """Running statistics of (z, r) of ligand centres, mergeable and bounded in memory.

    Keeps count, exact min/max, mean and M2 (Chan et al., 1979 merge) of z and
    r, a histogram of r (for quantiles) and, per z bin of width `bin_width`,
    the exact largest r (the envelope the cone must clear).

    Parameters
    ----------
    origin : array-like of shape (3,)
        Pocket centre, nm.
    axis : array-like of shape (3,)
        Unit axis.
    bin_width : float, default=0.02
        nm.

    Examples
    --------
    >>> s = FunnelStats([0, 0, 0], [0, 0, 1]).update([[0.3, 0.4, 0.1], [0, 0, -0.1]])
    >>> s.count, round(s.r_max, 6), round(s.z_mean, 6)
    (2, 0.5, 0.0)
    """

    def __init__(self, origin, axis, *, bin_width=0.02):
        self.origin = np.asarray(origin, dtype=np.float64)
        self.axis = _unit(axis, "axis")
        self.bin_width = float(bin_width)
        self.count = 0
        self._m = {"z": [0.0, 0.0], "r": [0.0, 0.0]}
        self.z_min = self.r_min = np.inf
        self.z_max = self.r_max = -np.inf
        self.envelope = {}            # z bin index -> max r
        self.r_hist = {}              # r bin index -> count

    def update(self, ligand_centers):
        """Add ligand centres of shape (n, 3), nm; returns self."""
        z, r = project_on_axis(np.asarray(ligand_centers, dtype=np.float64).reshape(-1, 3),
                               self.origin, self.axis)
        n = z.size
        if n == 0:
            return self
        for key, v in (("z", z), ("r", r)):
            mean_b, m2_b = v.mean(), ((v - v.mean()) ** 2).sum()
            mean_a, m2_a = self._m[key]
            tot = self.count + n
            delta = mean_b - mean_a
            self._m[key] = [mean_a + delta * n / tot,
                            m2_a + m2_b + delta * delta * self.count * n / tot]
        self.count += n
        self.z_min, self.z_max = float(min(self.z_min, z.min())), float(max(self.z_max, z.max()))
        self.r_min, self.r_max = float(min(self.r_min, r.min())), float(max(self.r_max, r.max()))
        zb = np.floor(z / self.bin_width).astype(np.int64)
        for b in np.unique(zb):
            self.envelope[int(b)] = max(self.envelope.get(int(b), 0.0), float(r[zb == b].max()))
        rb, cnt = np.unique(np.floor(r / self.bin_width).astype(np.int64), return_counts=True)
        for b, c in zip(rb.tolist(), cnt.tolist()):
            self.r_hist[b] = self.r_hist.get(b, 0) + c
        return self

    @property
    def z_mean(self):
        """Mean z, nm."""
        return float(self._m["z"][0])

    @property
    def z_std(self):
        """Standard deviation of z, nm."""
        return float(np.sqrt(self._m["z"][1] / max(self.count, 1)))

    @property
    def r_std(self):
        """Standard deviation of r, nm."""
        return float(np.sqrt(self._m["r"][1] / max(self.count, 1)))

    def r_quantile(self, q):
        """Quantile of r from the histogram (upper bin edge, conservative), nm."""
        keys = sorted(self.r_hist)
        cum = np.cumsum([self.r_hist[k] for k in keys])
        k = keys[int(np.searchsorted(cum, q * self.count))]
        return (k + 1) * self.bin_width


def _chunks(pocket_xyz, ligand_xyz, chunks):
    if chunks is not None:
        return chunks() if callable(chunks) else iter(chunks)
    return iter([(pocket_xyz, ligand_xyz)])


def size_funnel(pocket_xyz=None, ligand_xyz=None, *, chunks=None, exit_point=None,
                ligand_radius=None, cylinder_pad=0.2, k_std=2.0, min_margin=0.1,
                z_margin=0.2, blend=0.1, unbound_length=1.5, min_alpha=0.2,
                bin_width=0.02):
    """Recommend a cone+cylinder funnel from bound-state frames.

    Rules (margins are common practice in spirit; the numbers are from memory):

    * axis and origin: see :func:`funnel_axis`; origin = mean over frames of the
      pocket atoms' geometric centre;
    * lower wall ``z_min`` = deepest observed z minus ``max(z_margin, k_std std_z)``;
    * junction ``z_cc`` = highest observed z plus the same margin plus `blend`,
      so every bound position lies in the straight part of the cone;
    * ``r_cyl`` = ligand radius (largest atom distance from the ligand centre)
      + `cylinder_pad` (a few tenths of a nm, so the unbound ligand can rotate);
    * ``alpha`` = the smallest half-angle (at least `min_alpha`) such that, in
      every z bin, the cone radius exceeds the largest observed r by
      ``max(min_margin, k_std std_r)``;
    * upper wall ``z_max`` = ``z_cc + unbound_length`` (far enough for the
      ligand to be solvated; check against your box).

    Parameters
    ----------
    pocket_xyz : array-like of shape (n_frames, n_pocket, 3), optional
        nm.
    ligand_xyz : array-like of shape (n_frames, n_ligand, 3), optional
        nm.
    chunks : sequence or callable, optional
        Instead of the arrays: a re-iterable of ``(pocket_xyz, ligand_xyz)``
        chunks, or a callable returning a fresh iterator (two passes are made).
    exit_point : array-like of shape (3,), optional
        nm.
    ligand_radius : float, optional
        nm; measured from the frames when omitted.
    cylinder_pad, min_margin, z_margin, blend, unbound_length, bin_width : float
        nm.
    k_std : float, default=2.0
        Margins in standard deviations.
    min_alpha : float, default=0.2
        rad.

    Returns
    -------
    dict
        JSON-ready: ``params`` (origin, axis, z_min, z_max, z_cc, alpha, r_cyl,
        blend; nm, rad), ``observed`` statistics, ``margins``, ``reasoning``,
        ``caution``.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> pocket = np.tile([[1.0, 0, 0], [-1.0, 0, 0], [0, 1.0, 0], [0, -1.0, 0]], (50, 1, 1))
    >>> lig = rng.normal([0, 0, 0.3], 0.05, size=(50, 1, 3))
    >>> out = size_funnel(pocket, lig)
    >>> out["axis_rule"], out["params"]["z_min"] < 0.1 < out["params"]["z_cc"]
    ('ligand_offset', True)
    """
    # Pass 1: origin, mean ligand centre, mean pocket structure, ligand radius.
    n, osum, lsum, psum, lrad = 0, np.zeros(3), np.zeros(3), None, 0.0
    for p, q in _chunks(pocket_xyz, ligand_xyz, chunks):
        p, q = np.asarray(p, dtype=np.float64), np.asarray(q, dtype=np.float64)
        if p.ndim != 3 or q.ndim != 3 or len(p) != len(q):
            raise ValueError("pocket_xyz and ligand_xyz must have shapes (n_frames, n, 3) with "
                             f"equal n_frames; got {p.shape} and {q.shape}")
        c = q.mean(axis=1)
        n += len(p)
        osum += p.mean(axis=1).sum(axis=0)
        lsum += c.sum(axis=0)
        psum = p.sum(axis=0) if psum is None else psum + p.sum(axis=0)
        lrad = max(lrad, float(np.linalg.norm(q - c[:, None], axis=-1).max()))
    if n == 0:
        raise ValueError("no frames given to size_funnel")
    origin = osum / n
    axis, rule = funnel_axis(origin, exit_point, lsum / n, pocket_xyz=psum / n)
    # Pass 2: (z, r) statistics.
    stats = FunnelStats(origin, axis, bin_width=bin_width)
    for p, q in _chunks(pocket_xyz, ligand_xyz, chunks):
        stats.update(np.asarray(q, dtype=np.float64).mean(axis=1))
    lig_r = lrad if ligand_radius is None else float(ligand_radius)
    dz = max(z_margin, k_std * stats.z_std)
    dr = max(min_margin, k_std * stats.r_std)
    z_min = stats.z_min - dz
    z_cc = stats.z_max + dz + blend
    r_cyl = lig_r + cylinder_pad
    tan_needed = max((r + dr - r_cyl) / (z_cc - (b + 1) * bin_width)
                     for b, r in stats.envelope.items())
    alpha = max(min_alpha, float(np.arctan(max(tan_needed, 0.0))))
    params = {"origin": origin.tolist(), "axis": axis.tolist(), "z_min": z_min,
              "z_max": z_cc + unbound_length, "z_cc": z_cc, "alpha": alpha,
              "r_cyl": r_cyl, "blend": blend}
    return {
        "units": {"length": "nm", "angle": "rad"},
        "axis_rule": rule,
        "params": {k: (float(v) if np.isscalar(v) else v) for k, v in params.items()},
        "observed": {"n_frames": stats.count, "z_min": float(stats.z_min),
                     "z_max": float(stats.z_max), "z_mean": float(stats.z_mean),
                     "z_std": stats.z_std, "r_max": float(stats.r_max), "r_std": stats.r_std,
                     "r_q95": float(stats.r_quantile(0.95)), "ligand_radius": lig_r},
        "margins": {"z": dz, "r": dr, "k_std": k_std, "cylinder_pad": cylinder_pad},
        "reasoning": [
            f"axis by rule '{rule}' from the pocket centre (mean of pocket-atom centres)",
            f"z_min = lowest bound z {stats.z_min:.3f} - margin {dz:.3f} nm "
            f"(max of {z_margin} nm and {k_std} std; common practice, from memory)",
            f"z_cc = highest bound z {stats.z_max:.3f} + {dz:.3f} + blend {blend} nm",
            f"r_cyl = ligand radius {lig_r:.3f} + pad {cylinder_pad} nm",
            f"alpha = {alpha:.3f} rad: cone radius exceeds the largest bound r in every "
            f"{bin_width} nm z bin by at least {dr:.3f} nm",
            f"z_max = z_cc + {unbound_length} nm so the ligand can be solvated; check the box",
        ],
        "caution": CAUTION,
    }


def _g(z, z_cc, w):
    """Cone profile g(z) >= 0 and its derivative dg/dz."""
    lin = z <= z_cc - w
    mid = (~lin) & (z < z_cc + w)
    g = np.where(lin, z_cc - z, np.where(mid, (z_cc + w - z) ** 2 / (4 * w), 0.0))
    dg = np.where(lin, -1.0, np.where(mid, -(z_cc + w - z) / (2 * w), 0.0))
    return g, dg


def funnel_radius(z, params):
    """Funnel radius R(z), nm, and dR/dz (dimensionless).

    Examples
    --------
    >>> p = dict(z_cc=1.0, alpha=np.pi / 4, r_cyl=0.3, blend=0.1)
    >>> [round(float(v), 6) for v in funnel_radius(np.array([0.0, 2.0]), p)[0]]
    [1.3, 0.3]
    """
    g, dg = _g(np.asarray(z, dtype=np.float64), params["z_cc"], params["blend"])
    t = np.tan(params["alpha"])
    return params["r_cyl"] + t * g, t * dg


def funnel_energy(xyz_ligand_center, params, k_wall):
    """Flat-bottom harmonic restraint outside the funnel: energy and gradient.

    ``E = 0.5 k (r - R(z))**2`` where ``r > R(z)``, plus ``0.5 k (z_min - z)**2``
    below ``z_min`` and ``0.5 k (z - z_max)**2`` above ``z_max``.

    Parameters
    ----------
    xyz_ligand_center : array-like of shape (..., 3)
        Ligand centre(s), nm.
    params : dict
        ``params`` of :func:`size_funnel` (origin, axis, z_min, z_max, z_cc,
        alpha, r_cyl, blend).
    k_wall : float
        kJ/mol/nm**2.

    Returns
    -------
    energy : ndarray of shape (...)
        kJ/mol.
    gradient : ndarray of shape (..., 3)
        dE/dc, kJ/mol/nm. With the axis held fixed, the gradient with respect
        to the origin is ``-gradient``, and with respect to each of n pocket
        atoms defining the origin ``-gradient / n``.

    Examples
    --------
    >>> p = dict(origin=[0, 0, 0], axis=[0, 0, 1], z_min=-0.5, z_max=3.0, z_cc=1.0,
    ...          alpha=np.pi / 4, r_cyl=0.3, blend=0.1)
    >>> e, g = funnel_energy([[0.1, 0, 0.2], [0, 0, -0.6]], p, 1000.0)
    >>> [round(float(v), 6) for v in e]
    [0.0, 5.0]
    """
    c = np.asarray(xyz_ligand_center, dtype=np.float64)
    a = _unit(params["axis"], "axis")
    d = c - np.asarray(params["origin"], dtype=np.float64)
    z = d @ a
    rv = d - z[..., None] * a
    r = np.linalg.norm(rv, axis=-1)
    R, dR = funnel_radius(z, params)
    exc = np.maximum(r - R, 0.0)
    lo = np.maximum(params["z_min"] - z, 0.0)
    hi = np.maximum(z - params["z_max"], 0.0)
    k = float(k_wall)
    energy = 0.5 * k * (exc ** 2 + lo ** 2 + hi ** 2)
    rhat = rv / np.where(r > 0, r, 1.0)[..., None]
    grad = (k * exc)[..., None] * (rhat - dR[..., None] * a) + (k * (hi - lo))[..., None] * a
    return energy, grad


def plot_funnel(result, ligand_centers, path):
    """PNG of the funnel outline and ligand positions (z vs r); needs matplotlib.

    Parameters
    ----------
    result : dict
        Output of :func:`size_funnel`.
    ligand_centers : array-like of shape (n, 3)
        nm.
    path : str or path-like
        Output PNG.

    Returns
    -------
    str
        `path`.
    """
    try:
        import matplotlib
        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError as exc:  # pragma: no cover
        raise ImportError("plot_funnel needs matplotlib; install the 'plot' extra "
                          "(pip install 'cvdesign[plot]')") from exc
    p = result["params"]
    z, r = project_on_axis(np.asarray(ligand_centers).reshape(-1, 3), p["origin"], p["axis"])
    zz = np.linspace(p["z_min"], p["z_max"], 400)
    R, _ = funnel_radius(zz, p)
    fig, ax = plt.subplots(figsize=(6, 4))
    ax.plot(zz, R, "k-", label="funnel radius R(z)")
    ax.vlines([p["z_min"], p["z_max"]], 0, R.max(), colors="r", linestyles="--", label="walls")
    ax.axvline(p["z_cc"], color="grey", lw=0.8, label="cone-cylinder junction")
    ax.plot(z, r, ".", ms=2, alpha=0.5, label="bound ligand centre")
    ax.set_xlabel("z along axis / nm")
    ax.set_ylabel("r from axis / nm")
    ax.set_title("funnel sizing (starting point to validate)", fontsize=9)
    ax.legend(fontsize=7)
    fig.tight_layout()
    fig.savefig(path, dpi=100)
    plt.close(fig)
    return str(path)
