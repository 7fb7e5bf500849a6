"""Funnel-restraint sizing for a bound ligand, from bound-state frames.

A funnel restraint keeps a ligand inside a cone-plus-cylinder volume whose axis
runs from the binding pocket toward the solvent, so that biased sampling of
binding and unbinding explores a finite, well-defined volume. This module
finds the axis, measures the bound ligand's distribution along (z, nm) and
across (r, nm) the axis, recommends the funnel's size, and evaluates the
restraint's energy (kJ/mol) and gradient (kJ/mol/nm).

Geometry (all lengths nm, angles rad). The restraint acts on ``d``, the
vector from the pocket centre to the ligand centre (geometric centres, each
group made whole, minimum image in a periodic box), frame by frame: ``z = d .
axis`` and ``r = |d - z axis|``. The funnel radius is ``R(z) =
cylinder_radius_nm + tan(cone_half_angle_rad) g(z)`` with, writing ``c =
cone_end_z_nm`` and ``w = blend_half_width_nm``, ``g = c - z`` below ``c -
w``, ``g = (c + w - z)**2 / (4 w)`` within ``w`` of ``c``, and ``g = 0``
beyond: a cone wide over the pocket that narrows into a cylinder in the
solvent, with a quadratic blend that makes ``R`` and hence the energy
continuous with a continuous gradient (C1) at the junction. Walls at
``lower_wall_z_nm`` and ``upper_wall_z_nm`` close it along the axis.

The frame. The axis is a fixed direction, so the restraint only means what
it should while the pocket keeps one orientation. Sizing therefore works in
the frame of a *reference pocket*: the pocket of the first bound frame (the
starting structure), made whole and centred, in its box orientation. Every
frame's pocket is fitted onto it (Kabsch, 1976, Acta Cryst. A32, 922-923)
and that frame's ``d`` (computed by :func:`cvdesign.geometry.center_displacement`,
the code :meth:`cvdesign.spec.Spec.restraint_energy` uses) is rotated into
the reference frame before the axis and the sizes are chosen. Drift and
rotation of the whole complex, and a complex split across a periodic
boundary, therefore leave the sizing unchanged. The funnel is expressed in
the reference pocket's frame: during the biased run the pocket must be held
in that orientation (restrained or aligned); the spec stores the reference
pocket (``reference_pocket_nm``) for that purpose.

The frames come as arrays or chunks of arrays (:func:`size_funnel`) or as the
trajectories of a :class:`~cvdesign.io.source.Source`, read in two passes of the
pass engine (:func:`size_funnel_from_source`: local processes or a Dask cluster
give the same bytes; the reference pocket is read first, from the first frame).
Frames of biased runs given with their bias energies (:mod:`cvdesign.io.bias`)
are reweighted by ``exp(V/kT)``: every mean, standard deviation, quantile and
density is weighted, while the extremes that the funnel must clear are those
of every frame seen.

Caution: every suggested value is a starting point to validate (check that
the bound pose is unperturbed with the restraint on, and that the cylinder
reaches bulk solvent), not a guarantee.
"""

from dataclasses import dataclass

import numpy as np

from .. import geometry
from ..constants import UNITS
from ..errors import InputError
from ..geometry.box import _parse_box
from ..io.atomic import atomic_path
from ..io.bias import LOW_ESS_FRACTION, LOW_ESS_FRAMES, kish_ess
from ..io.source import Source, missing_box_warning, unboxed_files
from ..parallel import using_executor
from ..passes import (CoordinateFeaturizer, Pass, first_frame, frame_keys, plan_tasks, run_pass,
                      thinning_stride)
from .hints import _number

__all__ = ["CAUTION", "SHAPE_KEYS", "MAX_POSITIONS", "FunnelStats", "align_to_reference_pocket", "draw_funnel",
           "funnel_axis", "funnel_energy", "funnel_radius", "funnel_reach", "plot_funnel",
           "project_on_axis", "size_funnel", "size_funnel_from_source"]

CAUTION = ("Suggested funnel parameters are starting points to validate (bound pose "
           "unperturbed with the restraint on, cylinder reaching bulk solvent), not "
           "guarantees.")

#: The keys of a funnel's shape, in a restraint entry and in ``size_funnel(...)["params"]``
#: (besides ``axis``): nm along the axis for the walls and the cone end, rad for the
#: half-angle, nm for the radii.
SHAPE_KEYS = ("lower_wall_z_nm", "upper_wall_z_nm", "cone_end_z_nm", "cone_half_angle_rad",
              "cylinder_radius_nm", "blend_half_width_nm")

_WEIGHTS_EFFECT = ("the axis (mean fitted ligand offset and pocket), the mean pocket-fit RMSD, "
                   "the means and standard deviations of z, r and the centre distance (which "
                   "set the margins), the r quantile and the density of the plot are weighted; "
                   "the lowest and highest z and the largest r in each z bin (which the cone "
                   "must clear) are over every frame seen, whatever its weight; the positions "
                   "drawn in the report are frames, unweighted")
_WEIGHTED_NOTE = ("the bound frames come from biased runs and are reweighted by "
                  "exp(V/kT): " + _WEIGHTS_EFFECT)
_GIVEN_WEIGHTS_NOTE = "the frames carry the weights given (weights=): " + _WEIGHTS_EFFECT

_FRAME_NOTE = ("the funnel is expressed in the frame of the reference pocket (the pocket of the "
               "first bound frame, made whole and centred, in its box orientation): every "
               "frame's pocket was fitted onto it (Kabsch rotation) and the pocket-to-ligand "
               "vector (minimum image) rotated into that frame before sizing. The axis is "
               "fixed in the box frame of the biased run, so hold the pocket in the reference "
               "orientation there (restrained or aligned)")


def _unit(v, name):
    v = np.asarray(v, dtype=np.float64)
    n = np.linalg.norm(v) if v.shape == (3,) else np.nan
    if not n > 0 or not np.isfinite(n):
        raise InputError(f"{name} must be a finite non-zero 3-vector in nm; got "
                         f"{np.asarray(v).tolist()!r}")
    return v / n


#: nm: an exit point or mean ligand centre closer than this to the pocket centre gives no axis.
_MIN_OFFSET = 0.05


def _finite_exit_point(exit_point):
    e = np.asarray(exit_point, dtype=np.float64)
    if e.shape != (3,) or not np.all(np.isfinite(e)):
        raise InputError(f"the exit point must be three finite coordinates in nm; got "
                         f"{np.asarray(exit_point).tolist()!r}")
    return e


def _check_exit_offset(exit_point, center, offset, min_offset, where):
    """Refuse an exit point (nm) whose offset from the pocket centre defines no direction."""
    dist = float(np.linalg.norm(offset))
    if not dist >= min_offset:
        raise InputError(
            f"the exit point {np.round(exit_point, 4).tolist()} nm lies {dist:.4f} nm from the "
            f"pocket centre{where} {np.round(center, 4).tolist()} nm (closer than {min_offset} "
            "nm), so it defines no direction; give a point toward the solvent, away from the "
            "pocket centre")


def _check_exit_image(exit_point, center, offset, box):
    """Refuse an exit point (nm) farther from the pocket centre than half the smallest box
    height of `box` (None: no box, nothing to check): under periodic images its direction
    from the pocket is ambiguous (its nearest image may lie on the other side)."""
    if box is None:
        return
    half = 0.5 * float(geometry.box_heights(box).min())
    dist = float(np.linalg.norm(offset))
    if dist > half:
        raise InputError(
            f"the exit point (exit_point, --exit-point on the command line) "
            f"{np.round(exit_point, 4).tolist()} nm lies {dist:.4f} nm from the pocket centre "
            f"of the first bound frame {np.round(center, 4).tolist()} nm, more than half the "
            f"smallest box height of that frame ({half:.4f} nm): under periodic images its "
            "direction from the pocket is ambiguous (a nearer image of it may lie on the other "
            "side of the pocket, and the funnel would open away from the ligand); give a point "
            f"within {half:.4f} nm of that pocket centre, in the same coordinates, toward the "
            "solvent (e.g. 0.5-1 nm out of the pocket's mouth)")


def funnel_axis(pocket_center, exit_point=None, ligand_centers=None, *, pocket_xyz=None,
                min_offset=_MIN_OFFSET):
    """Unit axis from the pocket centre toward the solvent.

    Rule, in order: (1) through `exit_point` when given (exact; it must lie
    at least `min_offset` nm from the pocket centre); (2) through the mean
    ligand centre when it is at least `min_offset` nm from the pocket centre
    (ligands usually sit off-centre toward the mouth of a cavity, but not
    always: in a deep symmetric pocket this direction is noise); (3) the
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

    Raises
    ------
    InputError
        A non-finite exit point or one within `min_offset` of the pocket
        centre; no rule applies.

    Examples
    --------
    >>> a, rule = funnel_axis([0, 0, 0], exit_point=[0, 0, 2.0])
    >>> a.tolist(), rule
    ([0.0, 0.0, 1.0], 'exit_point')
    """
    o = np.asarray(pocket_center, dtype=np.float64)
    if exit_point is not None:
        e = _finite_exit_point(exit_point)
        _check_exit_offset(e, o, e - o, min_offset, "")
        return _unit(e - o, "exit_point - pocket_center"), "exit_point"
    lig = None
    if ligand_centers is not None:
        lig = np.asarray(ligand_centers, dtype=np.float64).reshape(-1, 3).mean(axis=0)
        if np.linalg.norm(lig - o) >= min_offset:
            return _unit(lig - o, "ligand offset"), "ligand_offset"
    if pocket_xyz is None:
        raise InputError("cannot define a funnel axis: the ligand sits within "
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

    Keeps count, exact min/max, mean and M2 (Chan et al., 1979 merge) of z,
    r and the distance ``sqrt(z**2 + r**2)`` from the origin, a histogram of
    r (for quantiles), per z bin of width `bin_width` the exact largest r
    (the envelope the cone must clear), and the occupancy of (z, r) cells
    (for the plot). Memory grows with the extent of the data in bins, not
    with the number of frames.

    Frames may carry weights (biased runs, :mod:`cvdesign.io.bias`): the
    means, M2, the r histogram and the cell occupancy are then weighted
    (``weight`` is the summed weight; ``count`` stays the number of frames),
    while the extremes and the envelope stay those of every frame seen (a
    weight does not change where the ligand went). Without weights ``weight``
    equals ``count`` and the arithmetic is the unweighted one.

    Parameters
    ----------
    origin : array-like of shape (3,)
        Pocket centre, nm (zero when the points are already displacements).
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
        self.weight = 0               # summed weight (the count, without weights)
        self._m = {"z": [0.0, 0.0], "r": [0.0, 0.0], "distance": [0.0, 0.0]}
        self.z_min = self.r_min = np.inf
        self.z_max = self.r_max = -np.inf
        self.envelope = {}            # z bin index -> max r
        self.r_hist = {}              # r bin index -> count
        self.cells = {}               # (z bin, r bin) -> count

    def update(self, ligand_centers, weights=None):
        """Add ligand centres of shape (n, 3), nm (with their weights, shape (n,), when
        given); returns self."""
        z, r = project_on_axis(np.asarray(ligand_centers, dtype=np.float64).reshape(-1, 3),
                               self.origin, self.axis)
        if z.size:
            self._absorb(self._of(z, r, None if weights is None
                                  else np.asarray(weights, dtype=np.float64)))
        return self

    def merge(self, other):
        """Statistics of these centres and those of `other` (same origin, axis and bins).

        Returns a new object; neither input is modified. Counts, extremes and
        bins merge exactly; means and sums of squares by Chan et al. (1979).
        """
        if other.bin_width != self.bin_width or not (np.array_equal(other.axis, self.axis)
                                                     and np.array_equal(other.origin,
                                                                        self.origin)):
            raise ValueError("cannot merge funnel statistics of another origin, axis or bin "
                             "width")
        out = FunnelStats(self.origin, self.axis, bin_width=self.bin_width)
        out.count, out._m = self.count, {key: list(v) for key, v in self._m.items()}
        out.weight = self.weight
        out.z_min, out.z_max, out.r_min, out.r_max = self.z_min, self.z_max, self.r_min, \
            self.r_max
        out.envelope, out.r_hist, out.cells = dict(self.envelope), dict(self.r_hist), \
            dict(self.cells)
        out._absorb(other)
        return out

    def _of(self, z, r, w=None):
        """Statistics of the (z, r) of some centres alone (weights `w`, or None)."""
        part = FunnelStats(self.origin, self.axis, bin_width=self.bin_width)
        part.count = z.size
        part.weight = z.size if w is None else float(w.sum())
        for key, v in (("z", z), ("r", r), ("distance", np.hypot(z, r))):
            if w is None:
                part._m[key] = [v.mean(), ((v - v.mean()) ** 2).sum()]
            else:
                mean = float(w @ v) / part.weight if part.weight > 0 else 0.0
                part._m[key] = [mean, float(w @ (v - mean) ** 2)]
        part.z_min, part.z_max = float(z.min()), float(z.max())
        part.r_min, part.r_max = float(r.min()), float(r.max())
        zb = np.floor(z / self.bin_width).astype(np.int64)
        rb_all = np.floor(r / self.bin_width).astype(np.int64)
        for b in np.unique(zb):
            part.envelope[int(b)] = float(r[zb == b].max())
        rb, inv, cnt = np.unique(rb_all, return_inverse=True, return_counts=True)
        if w is not None:
            cnt = np.bincount(inv.reshape(-1), weights=w, minlength=rb.size)
        part.r_hist = dict(zip(rb.tolist(), cnt.tolist()))
        cell, inv, cnt = np.unique(np.stack([zb, rb_all], axis=1), axis=0, return_inverse=True,
                                   return_counts=True)
        if w is not None:
            cnt = np.bincount(inv.reshape(-1), weights=w, minlength=len(cell))
        part.cells = {(bz, br): c for (bz, br), c in zip(cell.tolist(), cnt.tolist())}
        return part

    def _absorb(self, other):
        """Add the statistics of `other` into these, in place."""
        if other.count == 0:
            return
        n = other.weight  # (the count, without weights)
        for key in self._m:
            mean_b, m2_b = other._m[key]
            mean_a, m2_a = self._m[key]
            tot = self.weight + n
            if not tot > 0:  # (weights of zero only: nothing to average)
                continue
            delta = mean_b - mean_a
            self._m[key] = [mean_a + delta * n / tot,
                            m2_a + m2_b + delta * delta * self.weight * n / tot]
        self.count += other.count
        self.weight += n
        self.z_min, self.z_max = float(min(self.z_min, other.z_min)), \
            float(max(self.z_max, other.z_max))
        self.r_min, self.r_max = float(min(self.r_min, other.r_min)), \
            float(max(self.r_max, other.r_max))
        for b, r in other.envelope.items():
            self.envelope[b] = max(self.envelope.get(b, 0.0), r)
        for b, c in other.r_hist.items():
            self.r_hist[b] = self.r_hist.get(b, 0) + c
        for cell, c in other.cells.items():
            self.cells[cell] = self.cells.get(cell, 0) + c

    def _std(self, key):
        return float(np.sqrt(self._m[key][1] / (self.weight if self.weight > 0 else 1)))

    @property
    def z_mean(self):
        """Mean z, nm."""
        return float(self._m["z"][0])

    @property
    def z_std(self):
        """Standard deviation of z, nm."""
        return self._std("z")

    @property
    def r_std(self):
        """Standard deviation of r, nm."""
        return self._std("r")


    @property
    def distance_mean(self):
        """Mean distance from the origin, nm."""
        return float(self._m["distance"][0])

    @property
    def distance_std(self):
        """Standard deviation of the distance from the origin, nm."""
        return self._std("distance")

    def r_quantile(self, q):
        """Quantile of r from the histogram (upper bin edge, conservative), nm; weighted
        when the frames are."""
        keys = sorted(self.r_hist)
        cum = np.cumsum([self.r_hist[k] for k in keys])
        k = keys[min(int(np.searchsorted(cum, q * self.weight)), len(keys) - 1)]
        return (k + 1) * self.bin_width


def _chunks(pocket_xyz, ligand_xyz, box, chunks):
    """Chunks as (pocket, ligand, box) triples, box None when not periodic."""
    if chunks is None:
        it = iter([(pocket_xyz, ligand_xyz, box)])
    else:
        it = chunks() if callable(chunks) else iter(chunks)
    for item in it:
        p, q, b = (item[0], item[1], None) if len(item) == 2 else item
        if np.shape(p)[:1] != (0,):     # chunks without frames add nothing
            yield p, q, b


@dataclass(frozen=True)
class _Reference:
    """The reference pocket: the first bound frame's, made whole and centred (nm), its centre
    in that frame (nm), and that frame's box (None without one)."""

    pocket: np.ndarray
    center: np.ndarray
    box: object


@dataclass
class _FrameFit:
    """Frames fitted onto the reference pocket: pocket-to-ligand vectors in the reference
    frame (nm), centred pockets (nm), rotations, fit RMSD (nm), whole groups (nm)."""

    d: np.ndarray
    centred: np.ndarray
    rotation: np.ndarray
    rmsd: np.ndarray
    whole_p: np.ndarray
    whole_q: np.ndarray


def _fit_frames(p, q, box, reference, *, frame_offset=0):
    """Fit every frame's pocket onto the reference and rotate its pocket-to-ligand vector.

    A pure function of each frame and the reference. `reference` None: the
    first frame's pocket becomes it (refused when it fixes no orientation).

    Returns
    -------
    _Reference, _FrameFit
    """
    n_p = p.shape[1]
    xyz = np.concatenate([p, q], axis=1)
    pocket, ligand = np.arange(n_p), np.arange(n_p, xyz.shape[1])
    # The same function Spec.restraint_energy evaluates the restraint with.
    d, _, _ = geometry.center_displacement(xyz, pocket, ligand, box)
    whole_p, whole_q = geometry.whole_groups(xyz, [pocket, ligand], box)
    centre = whole_p.mean(axis=1)
    centred = whole_p - centre[:, None, :]
    if reference is None:
        if not geometry.defines_orientation(centred[0]):
            raise InputError(
                f"the pocket ({n_p} atoms) does not fix an orientation in the first frame: "
                "fewer than 3 atoms, or all (nearly) on one line; choose a pocket of at "
                "least 3 atoms spread in two directions (e.g. the C-alpha atoms lining it)")
        kind, parsed = _parse_box(box, len(p))
        reference = _Reference(centred[0].copy(), centre[0].copy(),
                               None if kind is None else parsed[0])
    rotation, rmsd = geometry.kabsch_rotation(centred, reference.pocket,
                                              frame_offset=frame_offset)
    fitted_d = np.einsum("fj,fjk->fk", d, rotation)
    return reference, _FrameFit(fitted_d, centred, rotation, rmsd, whole_p, whole_q)


class _FitSums:
    """What the first pass over the bound frames gathers, mergeable.

    Frames; sums of the fitted pocket-to-ligand vectors and of the fitted
    pockets (nm); the largest ligand radius (nm); sum and largest pocket-fit
    RMSD (nm); half the smallest box height (nm; inf without a box); the
    farthest atom of a whole group from its first atom (nm); the summed weight
    ``w`` of the frames (the frame count, without weights). With weights
    (biased runs) the sums are weighted; the extremes are over every frame.
    """

    __slots__ = ("n", "dsum", "psum", "lrad", "rmsd_sum", "rmsd_max", "half_height",
                 "group_reach", "w", "blocks")

    def __init__(self, n=0, dsum=None, psum=None, lrad=0.0, rmsd_sum=0.0, rmsd_max=0.0,
                 half_height=np.inf, group_reach=0.0, w=None, blocks=None):
        self.n, self.dsum, self.psum, self.lrad = n, dsum, psum, lrad
        self.rmsd_sum, self.rmsd_max = rmsd_sum, rmsd_max
        self.half_height, self.group_reach = half_height, group_reach
        self.w = n if w is None else w
        #: per (segment, block of its run) the summed weight and fitted vectors (read from a
        #: source: the axis's uncertainty by batch means), or None
        self.blocks = blocks

    @classmethod
    def of(cls, fit, box, weights=None):
        """Sums of some fitted frames (`box` None when they have none; `weights` of the
        frames, or None)."""
        if weights is None:
            dsum = fit.d.sum(axis=0)
            psum = np.einsum("faj,fjk->ak", fit.centred, fit.rotation)
            rmsd_sum, w = float(fit.rmsd.sum()), None
        else:
            weights = np.asarray(weights, dtype=np.float64)
            dsum = weights @ fit.d
            psum = np.einsum("f,faj,fjk->ak", weights, fit.centred, fit.rotation)
            rmsd_sum, w = float(weights @ fit.rmsd), float(weights.sum())
        out = cls(len(fit.d), dsum, psum,
                  float(np.linalg.norm(fit.whole_q - fit.whole_q.mean(axis=1, keepdims=True),
                                       axis=-1).max()),
                  rmsd_sum, float(fit.rmsd.max()), w=w)
        if box is not None:
            out.half_height = 0.5 * float(geometry.box_heights(box).min())
            out.group_reach = max(float(np.linalg.norm(w - w[:, :1], axis=-1).max())
                                  for w in (fit.whole_p, fit.whole_q))
        return out

    def merge(self, other):
        """Sums of these frames followed by `other`'s (a new object)."""
        if self.n == 0 or other.n == 0:
            return other if self.n == 0 else self
        blocks = None
        if self.blocks is not None and other.blocks is not None:
            blocks = dict(self.blocks)
            for key, (w, d) in other.blocks.items():
                if key in blocks:
                    blocks[key] = (blocks[key][0] + w, blocks[key][1] + d)
                else:
                    blocks[key] = (w, d)
        return _FitSums(self.n + other.n, self.dsum + other.dsum, self.psum + other.psum,
                        max(self.lrad, other.lrad), self.rmsd_sum + other.rmsd_sum,
                        max(self.rmsd_max, other.rmsd_max),
                        min(self.half_height, other.half_height),
                        max(self.group_reach, other.group_reach), self.w + other.w, blocks)


class _Fitter:
    """Chunks of arrays as :func:`size_funnel` gets them: checked, fitted onto the reference
    pocket (set by the first frame seen when not given), frames counted for messages."""

    def __init__(self, reference=None):
        self.reference = reference
        self.n_frames = 0

    def __call__(self, p, q, box):
        p, q = np.asarray(p, dtype=np.float64), np.asarray(q, dtype=np.float64)
        if p.ndim != 3 or q.ndim != 3 or len(p) != len(q) or p.shape[2:] != (3,) \
                or q.shape[2:] != (3,) or p.shape[1] == 0 or q.shape[1] == 0:
            raise InputError("pocket_xyz and ligand_xyz must have shapes (n_frames, n, 3) with "
                             f"equal n_frames and at least one atom; got {p.shape} and {q.shape}")
        if self.reference is not None and p.shape[1] != len(self.reference.pocket):
            raise InputError(f"a chunk has {p.shape[1]} pocket atoms where the first had "
                             f"{len(self.reference.pocket)}; give the same atoms in every chunk")
        for name, arr in (("pocket_xyz", p), ("ligand_xyz", q)):
            bad = ~np.isfinite(arr).all(axis=2)
            if bad.any():
                f, j = (int(v) for v in np.argwhere(bad)[0])
                raise InputError(f"{name} has NaN or infinite coordinates in frame "
                                 f"{self.n_frames + f} (counting all frames given), atom {j} "
                                 "of that group; give finite coordinates in nm")
        self.reference, fit = _fit_frames(p, q, box, self.reference,
                                          frame_offset=self.n_frames)
        self.n_frames += len(p)
        return fit


def funnel_radius(z, params):
    """Funnel radius R(z), nm, and dR/dz (dimensionless).

    Parameters
    ----------
    z : array-like
        nm along the axis.
    params : dict
        With ``cone_end_z_nm``, ``cone_half_angle_rad``, ``cylinder_radius_nm``,
        ``blend_half_width_nm``.

    Returns
    -------
    radius : ndarray
        nm.
    slope : ndarray
        dR/dz.

    Examples
    --------
    >>> p = dict(cone_end_z_nm=1.0, cone_half_angle_rad=np.pi / 4, cylinder_radius_nm=0.3,
    ...          blend_half_width_nm=0.1)
    >>> [round(float(v), 6) for v in funnel_radius(np.array([0.0, 2.0]), p)[0]]
    [1.3, 0.3]
    """
    z = np.asarray(z, dtype=np.float64)
    c, w = params["cone_end_z_nm"], params["blend_half_width_nm"]
    lin = z <= c - w
    mid = (~lin) & (z < c + w)
    g = np.where(lin, c - z, np.where(mid, (c + w - z) ** 2 / (4 * w), 0.0))
    dg = np.where(lin, -1.0, np.where(mid, -(c + w - z) / (2 * w), 0.0))
    t = np.tan(params["cone_half_angle_rad"])
    return params["cylinder_radius_nm"] + t * g, t * dg


def funnel_reach(params):
    """Largest distance of a point of the funnel from the pocket centre, nm.

    ``z**2 + R(z)**2`` is convex in z (R is convex and positive), so the
    farthest points lie on the rim of one of the two walls.

    Parameters
    ----------
    params : dict
        The shape keys (:data:`SHAPE_KEYS`).

    Returns
    -------
    reach : float
        nm.
    where : str
        ``'upper wall'`` or ``'lower wall'``.

    Examples
    --------
    >>> p = dict(lower_wall_z_nm=-0.5, upper_wall_z_nm=3.0, cone_end_z_nm=1.0,
    ...          cone_half_angle_rad=np.pi / 4, cylinder_radius_nm=0.4, blend_half_width_nm=0.1)
    >>> reach, where = funnel_reach(p)
    >>> round(reach, 6), where
    (3.026549, 'upper wall')
    """
    lo, hi = params["lower_wall_z_nm"], params["upper_wall_z_nm"]
    r_lo = float(funnel_radius(np.array([lo]), params)[0][0])
    r_hi = float(funnel_radius(np.array([hi]), params)[0][0])
    upper, lower = float(np.hypot(hi, r_hi)), float(np.hypot(lo, r_lo))
    return (upper, "upper wall") if upper >= lower else (lower, "lower wall")


#: Most ligand positions returned (``positions``, for the report's picture): a subsample
#: of the frames by a stride chosen from the frame counts.
MAX_POSITIONS = 5000

#: Fewest bound frames for a funnel size: its margins are multiples of the ligand's
#: spread, which a handful of frames does not estimate (common practice).
MIN_FUNNEL_FRAMES = 10


def size_funnel(pocket_xyz=None, ligand_xyz=None, box=None, *, chunks=None, exit_point=None,
                ligand_radius=None, cylinder_pad=0.2, k_std=2.0, min_margin=0.1,
                z_margin=0.2, blend_half_width=0.1, unbound_length=1.5, min_half_angle=0.2,
                bin_width=0.02, weights=None):
    """Recommend a cone+cylinder funnel from bound-state frames.

    The funnel is sized in the frame in which the restraint is evaluated.
    Per frame, ``d`` = ligand centre - pocket centre (geometric centres, each
    group made whole, minimum image: :func:`cvdesign.geometry.center_displacement`,
    as :meth:`cvdesign.spec.Spec.restraint_energy`); the pocket (made whole,
    centred) is fitted onto the reference pocket (the first frame's, in its
    box orientation) by the Kabsch rotation (Kabsch, 1976, Acta Cryst. A32,
    922-923) and ``d`` is rotated with it. The axis and every size come from
    these fitted vectors, so the funnel is expressed in the reference
    pocket's frame, and a run that uses it must hold the pocket in that
    orientation (restrained or aligned). Two passes are made over the
    frames; memory does not grow with their number.

    Rules (margins are common practice in spirit; the numbers are from memory):

    * axis: see :func:`funnel_axis` (in the reference frame; the exit point is
      taken in the coordinates of the first frame and must lie within half
      that frame's smallest box height of its pocket centre: farther, its
      direction is ambiguous under periodic images, and it is refused);
    * ``lower_wall_z_nm`` = deepest observed z minus ``max(z_margin, k_std std_z)``;
    * ``cone_end_z_nm`` = highest observed z plus the same margin plus
      `blend_half_width`, so every bound position lies in the straight part
      of the cone;
    * ``cylinder_radius_nm`` = ligand radius (largest atom distance from the
      ligand centre) + `cylinder_pad` (a few tenths of a nm, so the unbound
      ligand can rotate);
    * ``cone_half_angle_rad`` = the smallest half-angle (at least
      `min_half_angle`) such that, in every z bin, the cone radius exceeds
      the largest observed r by ``max(min_margin, k_std std_r)``;
    * ``upper_wall_z_nm`` = ``cone_end_z_nm + unbound_length`` (far enough
      for the ligand to be solvated; check against your box).

    A warning (in ``warnings`` and ``reasoning``) says when the bound ligand's
    mean z is not positive (the funnel opens away from the ligand: an exit
    point on the wrong side of the pocket), when the funnel reaches
    beyond half the smallest box height of the given frames (the
    pocket-to-ligand vector would then jump to another periodic image inside
    the funnel), or when a group may be too large to be made whole.

    Parameters
    ----------
    pocket_xyz : array-like of shape (n_frames, n_pocket, 3), optional
        nm.
    ligand_xyz : array-like of shape (n_frames, n_ligand, 3), optional
        nm.
    box : array-like or None, default=None
        Periodic box of the frames, nm (see :func:`cvdesign.geometry.minimum_image`).
    chunks : sequence or callable, optional
        Instead of the arrays: a re-iterable of ``(pocket_xyz, ligand_xyz)`` or
        ``(pocket_xyz, ligand_xyz, box)`` chunks, or a callable returning a
        fresh iterator (two passes are made).
    exit_point : array-like of shape (3,), optional
        nm, in the coordinates of the first frame.
    ligand_radius : float, optional
        nm; measured from the frames when omitted.
    cylinder_pad, min_margin, z_margin, blend_half_width, unbound_length, bin_width : float
        nm.
    k_std : float, default=2.0
        Margins in standard deviations.
    min_half_angle : float, default=0.2
        rad.
    weights : array-like of shape (n_frames,), optional
        Non-negative weight of each frame of the arrays (e.g. ``exp(V/kT)`` of a
        biased run, V the bias energy in kJ/mol): the axis, the means and standard
        deviations behind the margins, the r quantile and the density are weighted,
        the extremes the funnel must clear are over every frame, as for biased runs
        in :func:`size_funnel_from_source`; ``observed`` then holds the Kish
        effective sample size. Not with `chunks` (give the frames as arrays, or the
        runs with their bias files to :func:`size_funnel_from_source`).

    Returns
    -------
    dict
        JSON-ready: ``params`` (``axis`` and :data:`SHAPE_KEYS`; nm, rad),
        ``reference_pocket_nm`` (the centred reference pocket, one row per
        pocket atom), ``reference_center_nm`` (its centre in the first
        frame), ``observed`` statistics (nm), ``margins``, ``density``
        (occupied (z, r) cells, for the plot), ``positions`` (``{"z_nm": [...],
        "r_nm": [...]}``: the ligand centre along and across the axis, nm, in the
        reference pocket's frame, of every ``stride``-th frame given, at most
        :data:`MAX_POSITIONS`), ``warnings``, ``reasoning``, ``caution``.

    Raises
    ------
    InputError
        Bad shapes, non-finite coordinates, a pocket that does not fix an
        orientation, a bad exit point (not finite, at the pocket centre, or
        farther from it than half the first frame's smallest box height).

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> pocket = np.tile([[1.0, 0, 0], [-1.0, 0, 0], [0, 1.0, 0], [0, -1.0, 0]], (50, 1, 1))
    >>> lig = rng.normal([0, 0, 0.3], 0.05, size=(50, 1, 3))
    >>> out = size_funnel(pocket, lig)
    >>> p = out["params"]
    >>> out["axis_rule"], p["lower_wall_z_nm"] < 0.1 < p["cone_end_z_nm"]
    ('ligand_offset', True)
    """
    w = None if weights is None else _frame_weights(weights, chunks, pocket_xyz)

    def first():
        fitter, sums = _Fitter(), _FitSums()
        for p, q, b in _chunks(pocket_xyz, ligand_xyz, box, chunks):
            sums = sums.merge(_FitSums.of(fitter(p, q, b), b, w))
        return fitter.reference, sums

    def second(reference, stats, n):
        fitter = _Fitter(reference)
        stride = thinning_stride([n], MAX_POSITIONS)
        z_kept, r_kept = [], []
        for p, q, b in _chunks(pocket_xyz, ligand_xyz, box, chunks):
            first = fitter.n_frames
            d = fitter(p, q, b).d
            stats.update(d, w)
            z, r = project_on_axis(d, stats.origin, stats.axis)
            keep = (first + np.arange(len(d))) % stride == 0
            z_kept.append(z[keep])
            r_kept.append(r[keep])
        return stats, _positions(z_kept, r_kept)

    return _size(first, second, "give a re-iterable or a callable for chunks",
                 exit_point=exit_point, ligand_radius=ligand_radius, cylinder_pad=cylinder_pad,
                 k_std=k_std, min_margin=min_margin, z_margin=z_margin,
                 blend_half_width=blend_half_width, unbound_length=unbound_length,
                 min_half_angle=min_half_angle, bin_width=bin_width, given_weights=w)


def _frame_weights(weights, chunks, pocket_xyz):
    """The `weights` of :func:`size_funnel`, checked: one finite, non-negative value per
    frame of the arrays, not all zero."""
    if chunks is not None:
        raise InputError("weights= goes with the frames given as arrays, not with chunks: "
                         "give pocket_xyz and ligand_xyz, or the runs with their bias "
                         "energies to size_funnel_from_source")
    raw = np.asarray(weights)
    if raw.dtype.kind not in "biuf":
        raise InputError(f"weights must be real numbers, one per frame; got {raw.dtype} values")
    w = raw.astype(np.float64)
    n = np.shape(pocket_xyz)[0] if np.ndim(pocket_xyz) == 3 else None
    if w.ndim != 1 or (n is not None and w.shape[0] != n):
        raise InputError(f"weights has shape {w.shape}; give one weight per frame "
                         f"({n} frames)")
    if not (np.isfinite(w).all() and (w >= 0).all() and w.max() > 0):
        raise InputError("weights must be finite and non-negative, not all zero (e.g. "
                         "exp(V/kT) of each frame, V its bias energy in kJ/mol)")
    return w / w.max()  # every statistic is scale-free; sums of squares stay in range


#: Blocks per run for the uncertainty of an axis through the mean ligand offset (batch
#: means; our choice: enough blocks for a spread, each long beside the ligand's wiggle in a
#: run of a few hundred frames or more).
AXIS_BLOCKS = 5


#: The radius holding 95 % of a two-dimensional isotropic Gaussian, in units of its rms
#: radius: sqrt(ln 20) (Rayleigh's law; derived here).
_R95 = float(np.sqrt(np.log(20.0)))


def _axis_uncertainty(blocks, axis, z_mean):
    """(angle in rad, its basis as text) of an axis through the mean ligand offset, or
    (None, "") when the blocks cannot tell.

    Batch means (Flyvbjerg and Petersen, J. Chem. Phys. 91, 461, 1989): the fitted
    pocket-to-ligand vectors are averaged in :data:`AXIS_BLOCKS` blocks per run, and the
    scatter of the block means across the axis gives the standard error of the mean
    offset across it, ``sqrt(sum_b (w_b / W)^2 |m_b - m|_perp^2 x B / (B - 1))``; its angle
    seen from the pocket centre at the mean offset along the axis. Blocks shorter than the
    ligand's correlation time make it too small, so with two runs or more the same error
    from the runs' own means (the longest blocks there are, noisier) is taken when it is
    larger, as the blocking method does when the error grows with the block length."""
    if not blocks or len(blocks) < 2 or not z_mean > 0:
        return None, ""
    keys = sorted(blocks)
    w = np.array([blocks[k][0] for k in keys])
    d = np.array([blocks[k][1] for k in keys])
    se = _offset_error(w, d, axis)
    if se is None:
        return None, ""
    n_blocks = int((w > 0).sum())
    runs = sorted({k[0] for k in keys})
    by_run = [[i for i, k in enumerate(keys) if k[0] == r] for r in runs]
    n_runs = int(sum(w[i].sum() > 0 for i in by_run))  # runs with weight
    se_runs = _offset_error(np.array([w[i].sum() for i in by_run]),
                            np.array([d[i].sum(axis=0) for i in by_run]), axis)
    if se_runs is not None and se_runs > se:
        basis = (f"from the means of the {n_runs} runs, "
                 f"larger than from {n_blocks} block means ({AXIS_BLOCKS} per run), which are "
                 "shorter than the ligand's correlation time")
        se = se_runs
    else:
        basis = f"from {n_blocks} block means ({AXIS_BLOCKS} per run)" + (
            "" if se_runs is not None else "; one run with weight, so not checked against "
            "run means: an underestimate if its blocks are shorter than the ligand's "
            "correlation time")
    angle = float(np.arctan2(se, z_mean))
    return angle, (f"standard error {se:.3f} nm of the mean offset across the axis, "
                   f"{basis}, against the mean offset along it, {z_mean:.3f} nm")


def _offset_error(w, d, axis):
    """Standard error of the weighted mean offset across `axis`, nm, from groups of summed
    weights `w` and summed weighted offsets `d` (batch means); None from fewer than two
    groups with weight."""
    keep = w > 0
    w, m = w[keep], d[keep] / w[keep, None]
    if w.size < 2:
        return None
    mean = w @ m / w.sum()
    across = (m - mean) - np.outer((m - mean) @ axis, axis)
    return float(np.sqrt((w / w.sum()) ** 2 @ (across ** 2).sum(axis=1) * w.size
                         / (w.size - 1)))


def _check_options(*, ligand_radius, cylinder_pad, k_std, min_margin, z_margin,
                   blend_half_width, unbound_length, min_half_angle, bin_width):
    """Refuse sizing options that give no funnel (InputError naming the option): lengths in
    nm finite, the pads and margins >= 0, the widths, lengths and `k_std` > 0, the smallest
    half-angle in (0, pi/2) rad (a zero bin width had given bins of garbage, a zero blend a
    division by zero, a negative unbound length an upper wall below the lower one)."""
    if ligand_radius is not None:
        _number("ligand_radius", ligand_radius, allow_zero=True)
    for name, value in (("cylinder_pad", cylinder_pad), ("min_margin", min_margin),
                        ("z_margin", z_margin)):
        _number(name, value, allow_zero=True)
    for name, value in (("k_std", k_std), ("blend_half_width", blend_half_width),
                        ("unbound_length", unbound_length), ("bin_width", bin_width)):
        _number(name, value)
    if not 0.0 < _number("min_half_angle", min_half_angle) < 0.5 * np.pi:
        raise InputError(f"min_half_angle={min_half_angle!r} must lie between 0 and pi/2 rad "
                         "(a cone's half-angle)")


def _size(first, second, changed, *, exit_point=None, ligand_radius=None, cylinder_pad=0.2,
          k_std=2.0, min_margin=0.1, z_margin=0.2, blend_half_width=0.1, unbound_length=1.5,
          min_half_angle=0.2, bin_width=0.02, reweighting=None, given_weights=None):
    """The sizing from two passes over the frames (see :func:`size_funnel`).

    ``first()`` returns the reference pocket and the :class:`_FitSums` of every
    frame; ``second(reference, stats, n_frames)`` adds every frame's fitted vector
    to the empty :class:`FunnelStats` `stats` (on the axis chosen from the first
    pass) and returns them with the positions of at most :data:`MAX_POSITIONS`
    frames (:func:`_positions`); `changed` is the advice when the passes saw
    different frames. `reweighting` (a :class:`cvdesign.io.bias.Reweighting`, biased
    runs) adds its notes and the effective sample sizes to the result;
    `given_weights` (the frames' weights given to :func:`size_funnel`) its note and
    Kish effective sample size. The uncertainty of an axis through the mean ligand offset
    comes from the first pass's block sums (runs read from a source; none for arrays).
    """
    _check_options(ligand_radius=ligand_radius, cylinder_pad=cylinder_pad, k_std=k_std,
                   min_margin=min_margin, z_margin=z_margin, blend_half_width=blend_half_width,
                   unbound_length=unbound_length, min_half_angle=min_half_angle,
                   bin_width=bin_width)
    # Pass 1: reference pocket, mean fitted offset and pocket, ligand radius, box heights.
    reference, sums = first()
    n = sums.n
    if n < MIN_FUNNEL_FRAMES:
        raise InputError(
            f"funnel sizing from {n} bound frame(s): the margins come from the ligand's "
            f"fluctuations in the bound state, which need at least {MIN_FUNNEL_FRAMES} frames "
            "(a few hundred, spanning a few hundred ps, is better); give longer bound runs")
    exit_offset = None
    if exit_point is not None:
        e = _finite_exit_point(exit_point)
        exit_offset = e - reference.center
        _check_exit_offset(e, reference.center, exit_offset, _MIN_OFFSET,
                           " of the first bound frame")
        _check_exit_image(e, reference.center, exit_offset, reference.box)
    axis, rule = funnel_axis(np.zeros(3), exit_offset, sums.dsum / sums.w,
                             pocket_xyz=sums.psum / sums.w)
    # Pass 2: (z, r) statistics of the fitted vectors.
    stats, positions = second(reference, FunnelStats(np.zeros(3), axis, bin_width=bin_width),
                              n)
    if stats.count != n:
        raise InputError(f"the frames changed between the two passes ({n} then "
                         f"{stats.count}); {changed}")
    lrad, rmsd_sum, rmsd_max = sums.lrad, sums.rmsd_sum, sums.rmsd_max
    half_height, group_reach = sums.half_height, sums.group_reach
    lig_r = lrad if ligand_radius is None else float(ligand_radius)
    dz = max(z_margin, k_std * stats.z_std)
    dr = max(min_margin, k_std * stats.r_std)
    lower = stats.z_min - dz
    cone_end = stats.z_max + dz + blend_half_width
    cyl = lig_r + cylinder_pad
    tan_needed = max((r + dr - cyl) / (cone_end - (b + 1) * bin_width)
                     for b, r in stats.envelope.items())
    half_angle = max(min_half_angle, float(np.arctan(max(tan_needed, 0.0))))
    shape = {"lower_wall_z_nm": lower, "upper_wall_z_nm": cone_end + unbound_length,
             "cone_end_z_nm": cone_end, "cone_half_angle_rad": half_angle,
             "cylinder_radius_nm": cyl, "blend_half_width_nm": float(blend_half_width)}
    shape = {k: float(v) for k, v in shape.items()}
    warnings = []
    if not stats.z_mean > 0.0:
        warnings.append(
            f"the bound ligand's mean position along the axis is z = {stats.z_mean:.3f} nm, "
            f"at or below the pocket centre (axis by rule '{rule}'): the funnel opens away "
            "from the ligand, and unbinding along it would drag the ligand through the "
            "pocket; give an exit point (exit_point, --exit-point) on the ligand's side of "
            "the pocket, toward the solvent")
    reach, where = funnel_reach(shape)
    if np.isfinite(half_height) and reach >= half_height:
        warnings.append(
            f"the funnel reaches {reach:.3f} nm from the pocket centre (rim of the {where}), "
            f"beyond half the smallest box height of the bound frames ({half_height:.3f} nm): "
            "there the minimum-image vector from pocket to ligand jumps to another periodic "
            "image and the restraint no longer describes this funnel; use a larger box or a "
            "shorter funnel (smaller unbound_length, --unbound-length)")
    angle, axis_note = None, ""
    if rule == "ligand_offset" and sums.blocks is None:
        axis_note = ("its uncertainty not assessed: frames given as arrays carry no runs to "
                     "block; size_funnel_from_source, or cvdesign funnel, assesses it")
    elif rule == "ligand_offset":
        angle, axis_note = _axis_uncertainty(sums.blocks, axis, stats.z_mean)
        # 95 % of the axes about the true one lie within sqrt(ln 20) = 1.73 rms radii of
        # the mean offset across the axis (two isotropic Gaussian components, whose
        # radius follows Rayleigh's law, P(R > r) = exp(-r^2 / rms^2); derived here)
        angle95 = None if angle is None else float(np.arctan(np.tan(angle) * _R95))
        if angle is not None and (angle95 > half_angle or angle > np.arctan(0.5)):
            reasons = ([f"95 % of such axes within about {np.degrees(angle95):.0f} degrees, "
                        f"more than the cone's half-angle ({np.degrees(half_angle):.0f} "
                        "degrees)"] if angle95 > half_angle else []) \
                + (["the mean offset less than twice its standard error"]
                   if angle > np.arctan(0.5) else [])
            why = "; ".join(reasons)
            warnings.append(
                f"the axis through the mean ligand offset is uncertain by about "
                f"{np.degrees(angle):.0f} degrees (one standard error; {why}): {axis_note}; "
                "the unbinding direction is then not set well enough by the data for the "
                "cone. Give an exit point (exit_point, --exit-point) toward the solvent, or "
                "more or longer bound runs")
    if np.isfinite(half_height) and group_reach >= 0.9 * half_height:
        warnings.append(
            f"an atom of the pocket or ligand lies {group_reach:.3f} nm from its group's first "
            f"atom, close to half the smallest box height ({half_height:.3f} nm): the group may "
            "not have been made whole correctly; use a smaller group or a larger box")
    reasoning = [
        _FRAME_NOTE,
        f"axis by rule '{rule}' from the pocket centre, in the reference frame"
        + ("" if not axis_note else f" ({axis_note})" if angle is None else
           f" (uncertain by about {np.degrees(angle):.0f} degrees: {axis_note})")
        + f"; pocket fit RMSD mean {rmsd_sum / sums.w:.3f} nm, largest {rmsd_max:.3f} nm",
        f"lower_wall_z_nm = lowest bound z {stats.z_min:.3f} - margin {dz:.3f} nm "
        f"(max of {z_margin} nm and {k_std} std; common practice, from memory)",
        f"cone_end_z_nm = highest bound z {stats.z_max:.3f} + {dz:.3f} + blend half-width "
        f"{blend_half_width} nm",
        f"cylinder_radius_nm = ligand radius {lig_r:.3f} + pad {cylinder_pad} nm",
        (f"cone_half_angle_rad = {half_angle:.3f} rad: cone radius exceeds the largest bound r "
         f"in every {bin_width} nm z bin by at least {dr:.3f} nm"
         if half_angle > min_half_angle else
         f"cone_half_angle_rad = {half_angle:.3f} rad, the smallest allowed (min_half_angle): "
         + ("the cylinder alone" if tan_needed <= 0 else
            f"a cone of {np.arctan(tan_needed):.3f} rad")
         + f" would already keep the largest bound r of every {bin_width} nm z bin at least "
         f"{dr:.3f} nm inside it"),
        f"upper_wall_z_nm = cone_end_z_nm + {unbound_length} nm so the ligand can be solvated; "
        f"the funnel reaches {reach:.3f} nm from the pocket centre"
        + (f" (half the smallest box height: {half_height:.3f} nm)" if np.isfinite(half_height)
           else f" (no periodic box in the bound frames: every height of the run's box must "
                f"exceed {2 * reach:.3f} nm, which cvdesign export checks against the System's)"),
    ] + [f"WARNING: {w}" for w in warnings]
    observed_weights = {}
    if reweighting is not None:  # biased runs: say so, with the effective sample sizes
        rw_notes, rw_warnings = reweighting.describe()
        warnings += rw_warnings
        reasoning += [n for n in rw_notes if not n.startswith("warning: ")] + [
            f"WARNING: {w}" for w in rw_warnings] + [_WEIGHTED_NOTE]
        observed_weights = {
            "effective_sample_size": {reweighting.states[s]: float(reweighting.ess[s])
                                      for s in reweighting.biased_states},
            "reweighting_temperature_k": reweighting.temperature_k}
    elif given_weights is not None:
        ess, n_w = kish_ess(given_weights), given_weights.size
        reasoning.append(f"weights given for the {n_w} frames: Kish effective sample size "
                         f"{ess:.1f}")
        if ess < LOW_ESS_FRACTION * n_w or ess < LOW_ESS_FRAMES:  # as for biased runs
            w = (f"small effective sample size of the weighted frames ({ess:.1f} of {n_w}): "
                 "a few frames carry most of the weight, so the margins' spreads are noisy; "
                 "give more frames, or frames of a smaller bias")
            warnings.append(w)
            reasoning.append(f"WARNING: {w}")
        reasoning.append(_GIVEN_WEIGHTS_NOTE)
        observed_weights = {"effective_sample_size": {"weights": ess}}
    cells = sorted([bz, br, c] for (bz, br), c in stats.cells.items())
    return {
        "units": {key: UNITS[key] for key in ("length", "angle")},
        "frame": "reference pocket: the pocket of the first bound frame, made whole and "
                 "centred, in its box orientation",
        "axis_rule": rule,
        "params": {"axis": [float(v) for v in axis], **shape},
        "reference_pocket_nm": reference.pocket.tolist(),
        "reference_center_nm": reference.center.tolist(),
        "observed": {"n_frames": stats.count, "z_min_nm": float(stats.z_min),
                     "z_max_nm": float(stats.z_max), "z_mean_nm": stats.z_mean,
                     "z_std_nm": stats.z_std, "r_max_nm": float(stats.r_max),
                     "r_std_nm": stats.r_std, "r_q95_nm": float(stats.r_quantile(0.95)),
                     "ligand_radius_nm": lig_r,
                     "center_distance_mean_nm": stats.distance_mean,
                     "center_distance_std_nm": stats.distance_std,
                     "pocket_fit_rmsd_mean_nm": rmsd_sum / sums.w,
                     "pocket_fit_rmsd_max_nm": rmsd_max,
                     "half_smallest_box_height_nm": (float(half_height)
                                                     if np.isfinite(half_height) else None),
                     "funnel_reach_nm": reach, **observed_weights},
        "margins": {"z_nm": dz, "r_nm": dr, "k_std": k_std, "cylinder_pad_nm": cylinder_pad},
        "density": {"bin_width_nm": float(bin_width), "cells": cells},
        "positions": positions,
        "warnings": warnings,
        "reasoning": reasoning,
        "caution": CAUTION,
    }


def size_funnel_from_source(source, pocket, ligand, *, executor=None, **options):
    """Recommend a funnel from the bound-state trajectories of a source, on the pass engine.

    The same sizing as :func:`size_funnel` (see there for the rules and the
    frame of the reference pocket), reading the trajectories in two passes of
    :func:`cvdesign.passes.run_pass`: (1) every frame's pocket fitted onto the
    reference pocket -- that of the first frame of the source (of its first
    segment with a frame), read before the passes, so it does not depend on
    how the frames are split -- with the sums of the fitted pocket-to-ligand
    vectors and pockets, the ligand radius, the fit RMSD and the box heights;
    (2) the (z, r) statistics along the axis chosen from them, and the
    positions of the frames whose rank in their run is a multiple of a stride
    chosen from the frame counts (at most :data:`MAX_POSITIONS`; the same frames
    for every split). Memory does not grow with the number of frames, and the
    result is the same, byte for byte, for every executor and task split.

    Parameters
    ----------
    source : cvdesign.io.source.Source
        The bound-state trajectories (every frame with a state is used).
        Biased runs (given with their bias energies) are reweighted: the
        sums, means, standard deviations, r quantile and density are
        weighted by ``exp(V/kT)``; the extremes the funnel must clear are over
        every frame (see :class:`FunnelStats`). The reasoning then gives the
        effective sample size, and ``observed`` holds it per state.
    pocket, ligand : array-like of int
        0-based topology indices of the pocket and ligand atoms (no atom in
        both); the rows of ``reference_pocket_nm`` follow the order of
        `pocket`.
    executor : None, int, str, dask.distributed.Client or cvdesign.parallel.Executor
        Where the passes run: None in this process, an int that many local
        processes, a Dask client or scheduler address a cluster (see
        :func:`cvdesign.parallel.as_executor`).
    **options
        The keyword options of :func:`size_funnel` (`exit_point`,
        `ligand_radius`, `cylinder_pad`, `k_std`, `min_margin`, `z_margin`,
        `blend_half_width`, `unbound_length`, `min_half_angle`, `bin_width`).

    Returns
    -------
    dict
        As :func:`size_funnel` (``positions`` from the frames described above).

    Raises
    ------
    InputError
        A source that is not a Source, empty or overlapping atom groups, bad
        trajectories (naming the file and frame), and what :func:`size_funnel`
        refuses.
    cvdesign.parallel.ExecutorError
        When the executor fails.

    Examples
    --------
    ::

        from cvdesign import Source
        from cvdesign.bias.funnel import size_funnel_from_source
        from cvdesign.io.source import select_atoms
        src = Source("complex.pdb")
        src.add("bound-1.xtc", "bound")
        top = src.topology
        out = size_funnel_from_source(src, select_atoms(top, "resid 10 to 40 and name CA"),
                                      select_atoms(top, "resname LIG"), executor=2)
        print(out["params"])
    """
    if not isinstance(source, Source):
        raise InputError(f"size_funnel_from_source() needs a Source of the bound-state "
                         f"trajectories, not {type(source).__name__}")
    n_atoms = source.topology.n_atoms
    groups = []
    for name, group in (("pocket", pocket), ("ligand", ligand)):
        g = np.asarray(group).reshape(-1)
        if g.size == 0 or g.dtype.kind not in "iu" or g.min() < 0 or g.max() >= n_atoms \
                or np.unique(g).size != g.size:
            raise InputError(f"{name} must be distinct 0-based atom indices of the topology "
                             f"(0 to {n_atoms - 1}), at least one; got {np.asarray(group)!r}")
        groups.append(g.astype(np.intp))
    if np.intersect1d(*groups).size:
        raise InputError("pocket and ligand share atoms; the pocket must not include the ligand")
    unknown = set(options) - set(_SIZING_OPTIONS)
    if unknown:
        raise TypeError(f"size_funnel_from_source() got unexpected keyword(s) "
                        f"{', '.join(sorted(unknown))}")
    featurizer = CoordinateFeaturizer(np.concatenate(groups))
    columns = [np.searchsorted(featurizer.atom_indices, g) for g in groups]
    with using_executor(executor) as executor:
        plan = plan_tasks(source).for_features(featurizer.n_features, executor.n_workers)

        def first():
            found = first_frame(plan, featurizer.atom_indices)
            if found is None:
                return None, _FitSums()
            xyz, box = _coordinates(found[2])
            reference, _ = _fit_frames(xyz[:, columns[0]], xyz[:, columns[1]], box, None)
            return reference, run_pass(_FitPass(featurizer, *columns, reference), source,
                                       executor=executor, tasks=plan, label="funnel: axis")

        def second(reference, stats, n):
            stride = thinning_stride(plan.segment_counts().reshape(-1), MAX_POSITIONS)
            return run_pass(_StatsPass(featurizer, *columns, reference, stats, stride), source,
                            executor=executor, tasks=plan, label="funnel: sizing")

        out = _size(first, second, "were the trajectories changed during the run?",
                    reweighting=source.reweighting(), **options)
    boxless = missing_box_warning(source.topology_path, unboxed_files(source))
    if boxless is not None:  # (their ligand offsets taken without periodic images)
        out["warnings"].append(boxless)
        out["reasoning"].append(f"WARNING: {boxless}")
    return out


_SIZING_OPTIONS = ("exit_point", "ligand_radius", "cylinder_pad", "k_std", "min_margin",
                   "z_margin", "blend_half_width", "unbound_length", "min_half_angle",
                   "bin_width")


def _positions(z, r):
    """``{"z_nm": [...], "r_nm": [...]}`` from lists of arrays."""
    z = np.concatenate(z) if z else np.zeros(0)
    r = np.concatenate(r) if r else np.zeros(0)
    return {"z_nm": z.tolist(), "r_nm": r.tolist()}


def _coordinates(trajectory):
    """Coordinates (nm) and box vectors (nm, or None) of frames, float64."""
    box = trajectory.unitcell_vectors
    return (trajectory.xyz.astype(np.float64),
            None if box is None else np.asarray(box, dtype=np.float64))


class _FunnelPass(Pass):
    """Shared by the funnel's passes: the frames of a leaf fitted onto the reference pocket."""

    def __init__(self, featurizer, pocket, ligand, reference):
        self.featurizer, self.pocket, self.ligand = featurizer, pocket, ligand
        self.reference = reference

    def fit(self, leaf):
        xyz = leaf.x.reshape(leaf.x.shape[0], -1, 3)
        box = None if leaf.box is None else np.asarray(leaf.box, dtype=np.float64)
        p, q = xyz[:, self.pocket], xyz[:, self.ligand]
        try:
            return _fit_frames(p, q, box, self.reference)[1], box
        except InputError:  # name the file and the frame
            for r in range(len(p)):
                try:
                    _fit_frames(p[r:r + 1], q[r:r + 1], None if box is None else box[r:r + 1],
                                self.reference, frame_offset=int(leaf.frames[r]))
                except InputError as exc:
                    raise InputError(f"trajectory {leaf.layout.path!r}, pocket atoms: "
                                     f"{exc}") from None
            raise

    def merge(self, a, b):
        return a.merge(b)


class _FitPass(_FunnelPass):
    """Pass 1: the :class:`_FitSums` of every frame."""

    def map(self, leaf):
        fit, box = self.fit(leaf)
        out = _FitSums.of(fit, box, leaf.weights)
        keys = frame_keys(leaf.layout, leaf.frames)
        run = leaf.layout.counts[keys.states]
        block = keys.rank * AXIS_BLOCKS // np.maximum(run, 1)
        w = np.ones(len(fit.d)) if leaf.weights is None else np.asarray(leaf.weights,
                                                                         dtype=np.float64)
        out.blocks = {}
        for b in np.unique(block):
            rows = block == b
            out.blocks[(int(leaf.layout.index), int(b))] = (float(w[rows].sum()),
                                                            w[rows] @ fit.d[rows])
        return out

    def finish(self, partial, plan):
        return _FitSums() if partial is None else partial


class _StatsPass(_FunnelPass):
    """Pass 2: the :class:`FunnelStats` of every frame's fitted vector, about the origin
    and along the axis of `stats` (empty statistics, the template), and the (z, r) of
    the frames whose rank in their (segment, state) is a multiple of `stride`, in
    frame order. The result is ``(stats, positions)``."""

    def __init__(self, featurizer, pocket, ligand, reference, stats, stride=1):
        super().__init__(featurizer, pocket, ligand, reference)
        self.stats, self.stride = stats, int(stride)

    def _empty(self):
        return FunnelStats(self.stats.origin, self.stats.axis, bin_width=self.stats.bin_width)

    def map(self, leaf):
        d = self.fit(leaf)[0].d
        z, r = project_on_axis(d, self.stats.origin, self.stats.axis)
        keep = frame_keys(leaf.layout, leaf.frames).rank % self.stride == 0
        return self._empty().update(d, leaf.weights), [(z[keep], r[keep])]

    def merge(self, a, b):
        return a[0].merge(b[0]), a[1] + b[1]

    def finish(self, partial, plan):
        if partial is None:
            return self._empty(), _positions([], [])
        return partial[0], _positions([z for z, _ in partial[1]], [r for _, r in partial[1]])


def funnel_energy(displacement, params, force_constant):
    """Flat-bottom harmonic restraint outside the funnel: energy and gradient.

    ``E = 0.5 k (r - R(z))**2`` where ``r > R(z)``, plus ``0.5 k (lower - z)**2``
    below the lower wall and ``0.5 k (z - upper)**2`` above the upper wall.

    Parameters
    ----------
    displacement : array-like of shape (..., 3)
        Ligand centre minus pocket centre, nm, in the frame of the axis.
    params : dict
        ``axis`` and the shape keys :data:`SHAPE_KEYS` (``params`` of
        :func:`size_funnel`, or a spec's restraint entry).
    force_constant : float
        kJ/mol/nm**2.

    Returns
    -------
    energy : ndarray of shape (...)
        kJ/mol.
    gradient : ndarray of shape (..., 3)
        dE/d(displacement), kJ/mol/nm. With the axis held fixed, the gradient
        with respect to the ligand centre is ``gradient`` and with respect to
        the pocket centre ``-gradient``.

    Examples
    --------
    >>> p = dict(axis=[0, 0, 1], lower_wall_z_nm=-0.5, upper_wall_z_nm=3.0,
    ...          cone_end_z_nm=1.0, cone_half_angle_rad=np.pi / 4, cylinder_radius_nm=0.3,
    ...          blend_half_width_nm=0.1)
    >>> e, g = funnel_energy([[0.1, 0, 0.2], [0, 0, -0.6]], p, 1000.0)
    >>> [round(float(v), 6) for v in e]
    [0.0, 5.0]
    """
    d = np.asarray(displacement, dtype=np.float64)
    a = _unit(params["axis"], "axis")
    z = d @ a
    rv = d - z[..., None] * a
    r = np.linalg.norm(rv, axis=-1)
    R, dR = funnel_radius(z, params)
    exc = np.maximum(r - R, 0.0)
    lo = np.maximum(params["lower_wall_z_nm"] - z, 0.0)
    hi = np.maximum(z - params["upper_wall_z_nm"], 0.0)
    k = float(force_constant)
    energy = 0.5 * k * (exc ** 2 + lo ** 2 + hi ** 2)
    rhat = rv / np.where(r > 0, r, 1.0)[..., None]
    grad = (k * exc)[..., None] * (rhat - dR[..., None] * a) + (k * (hi - lo))[..., None] * a
    return energy, grad


def align_to_reference_pocket(xyz, pocket, reference, box=None):
    """Rotate whole frames so that the pocket has the reference orientation.

    Each frame (all atoms, and the box with them) is rotated about its pocket
    centre by the Kabsch rotation of the pocket (made whole, centred) onto
    `reference`. Rotating the atoms and the box vectors together is a rigid
    motion of the whole periodic system, so minimum images are kept; the
    funnel restraint of a spec (axis in the reference frame) then applies to
    the aligned frames as in a run that holds the pocket in place.

    Parameters
    ----------
    xyz : array-like of shape (n_frames, n_atoms, 3)
        nm.
    pocket : sequence of int
        0-based pocket atoms, in the order of the rows of `reference`.
    reference : array-like of shape (n_pocket, 3)
        Centred reference pocket, nm (a restraint's ``reference_pocket_nm``).
    box : array-like or None, default=None
        Periodic box in nm (see :func:`cvdesign.geometry.minimum_image`).

    Returns
    -------
    xyz : ndarray of shape (n_frames, n_atoms, 3)
        nm.
    box : ndarray of shape (n_frames, 3, 3) or None
        The rotated box vectors (rows), nm.

    Examples
    --------
    >>> ref = np.array([[1.0, 0, 0], [-0.5, 0.8, 0], [-0.5, -0.8, 0]])
    >>> turn = np.array([[0.0, 1, 0], [-1.0, 0, 0], [0, 0, 1.0]])
    >>> frame = np.concatenate([ref, [[0.0, 0, 0.4]]]) @ turn + 2.0
    >>> out, _ = align_to_reference_pocket(frame[None], [0, 1, 2], ref)
    >>> out[0].round(6).tolist()[3]
    [2.0, 2.0, 2.4]
    """
    x = np.asarray(xyz, dtype=np.float64)
    (whole,) = geometry.whole_groups(x, [pocket], box)
    centre = whole.mean(axis=1)
    rotation, _ = geometry.kabsch_rotation(whole - centre[:, None], reference)
    out = np.einsum("faj,fjk->fak", x - centre[:, None], rotation) + centre[:, None]
    if box is None:
        return out, None
    kind, parsed = _parse_box(box, len(x))
    vectors = np.stack([np.diag(v) for v in parsed]) if kind == "ortho" else parsed
    vectors = np.broadcast_to(vectors, (len(x), 3, 3))
    return out, np.einsum("fij,fjk->fik", vectors, rotation)


def draw_funnel(ax, params):
    """Draw the funnel outline R(z), its walls and the end of the cone on a matplotlib axis.

    Shared by :func:`plot_funnel` and the report (:mod:`cvdesign.report.figures`), which
    adds the ligand positions. Lengths in nm, in the reference pocket's frame.

    Parameters
    ----------
    ax : matplotlib.axes.Axes
        The axis to draw on; its labels are set (z and r in nm).
    params : dict
        The shape keys (:data:`SHAPE_KEYS`).

    Returns
    -------
    z : ndarray
        nm, the points along the axis where the outline was drawn.
    radius : ndarray
        nm, R(z) at those points.

    Examples
    --------
    >>> from matplotlib.figure import Figure
    >>> p = dict(lower_wall_z_nm=-0.5, upper_wall_z_nm=3.0, cone_end_z_nm=1.0,
    ...          cone_half_angle_rad=np.pi / 4, cylinder_radius_nm=0.4, blend_half_width_nm=0.1)
    >>> z, radius = draw_funnel(Figure().subplots(), p)
    >>> round(float(radius[0]), 6), round(float(radius[-1]), 6)
    (1.9, 0.4)
    """
    zz = np.linspace(params["lower_wall_z_nm"], params["upper_wall_z_nm"], 400)
    R, _ = funnel_radius(zz, params)
    ax.plot(zz, R, color="black", label="funnel radius R(z)")
    ax.vlines([params["lower_wall_z_nm"], params["upper_wall_z_nm"]], 0, R.max(),
              colors="#D55E00", linestyles="--", label="walls")
    ax.axvline(params["cone_end_z_nm"], color="grey", lw=0.8, label="cone end")
    ax.set_xlabel("z along axis / nm (reference pocket frame)")
    ax.set_ylabel("r from axis / nm")
    return zz, R


def plot_funnel(result, path):
    """Image of the funnel outline and the bound ligand positions (z vs r).

    The positions are the occupied (z, r) cells of ``result["density"]``, in
    the reference pocket's frame; the format follows the file extension
    (png, svg, pdf, ...). Drawn off-screen (no display needed); written atomically
    (temporary file, then rename).

    Parameters
    ----------
    result : dict
        Output of :func:`size_funnel`.
    path : str or path-like
        Output image.

    Returns
    -------
    str
        `path`.
    """
    from matplotlib.figure import Figure

    p = result["params"]
    w = result["density"]["bin_width_nm"]
    cells = np.asarray(result["density"]["cells"], dtype=np.float64).reshape(-1, 3)
    fig = Figure(figsize=(6, 4))
    ax = fig.subplots()
    draw_funnel(ax, p)
    ax.scatter((cells[:, 0] + 0.5) * w, (cells[:, 1] + 0.5) * w, s=4, c=np.log1p(cells[:, 2]),
               cmap="viridis", label="bound ligand centre (occupied cells)")
    ax.set_title("funnel sizing (starting point to validate)", fontsize=9)
    ax.legend(fontsize=7)
    fig.tight_layout()
    with atomic_path(path) as tmp:
        fig.savefig(tmp, dpi=100)
    return str(path)
