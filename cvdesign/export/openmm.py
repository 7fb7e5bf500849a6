"""A spec as OpenMM forces: the CV as a ``CustomCVForce``, the funnel as a centroid force.

OpenMM (Eastman et al., PLoS Comput. Biol. 13, e1005659, 2017) is an optional
dependency (``pip install 'cvdesign[openmm]'``), imported only when a force is
built; without it every function here that builds a force raises
:class:`~cvdesign.errors.InputError` saying how to install it.

How the spec maps onto OpenMM's force classes (units: nm, rad; OpenMM reports
every force's energy in kJ/mol, so the CV force's "energy" is the CV value in
the CV's own units; ``docs/spec-v1.md``, "OpenMM export", has the same table
for users):

- the CV, ``offset + sum_t weight_t (transform_t(d_t) - center_t) / scale_t``,
  is the energy expression of an ``openmm.CustomCVForce`` (:func:`cv_expression`)
  whose collective variables ``d0``, ``d1``, ... are the descriptors the terms
  use, in the order of first use; ``cos`` and ``sin`` are applied in that
  expression;
- ``distance``: ``CustomBondForce("r")``, one bond;
- ``angle``: ``CustomAngleForce("theta")``, the angle at the middle atom;
- ``dihedral``: ``CustomTorsionForce("theta")``, in [-pi, pi], with the spec's
  (IUPAC) sign;
- ``center_distance``: ``CustomCentroidBondForce(2, "distance(g1,g2)")`` with
  the spec's masses as weights (``"mass"``) or equal weights (``"geometric"``),
  always given explicitly (OpenMM would otherwise take the System's masses);
- ``coordination``: ``CustomBondForce`` with one bond per pair of
  :func:`cvdesign.geometry.coordination_pairs` and the rational switching
  function of :func:`switching_expression`: a Taylor series near r0, so that
  r = r0 gives the limit n/m instead of 0/0;
- the funnel restraint: :func:`restraint_force`, a ``CustomCentroidBondForce``
  on the ligand and pocket centres (:data:`FUNNEL_EXPRESSION`), in kJ/mol.

Periodic boxes. With ``periodic=True`` every force uses OpenMM's periodic
boundary conditions (``setUsesPeriodicBoundaryConditions``): each bond vector
of a distance, angle, dihedral or coordination pair, and the vector between
two group centres, is taken at its periodic image in the Context's box
(orthorhombic or triclinic, in OpenMM's reduced form). That image is the exact
minimum image the spec uses whenever the vector is shorter than half the
smallest box height, which holds for any descriptor of a molecule in a box much
larger than it; a longer vector (a distant coordination pair) may get another
image than the spec's, and the difference is then of the size of the switching
function's tail. Group centres are the weighted means of the positions the
Context holds: the spec makes each group whole first (every atom at its
minimum image from the group's first atom), so the two agree when the groups
are whole in the Context's positions, which is how OpenMM keeps them (it never
wraps atoms one by one during a run; give whole molecules at the start).

The box itself is not part of the force: OpenMM takes it from the Context,
which starts with the System's default box vectors. A System whose box was
never set has OpenMM's default, a cube of :data:`OPENMM_DEFAULT_BOX_NM` nm
edge, and a periodic force added to it runs in that box, where every vector
longer than half its edge is wrapped without an error (a 1.5 nm distance reads
0.5 nm). So with ``periodic=True`` the System must carry the simulation's box
(``System.setDefaultPeriodicBoxVectors``, or ``Context.setPeriodicBoxVectors``
before the run); given the System (``system=``), a periodic System whose box
is exactly that default is warned about (:func:`default_box_message`).
"""

import warnings

import numpy as np

from ..errors import InputError, SpecError
from ..geometry.contacts import _SERIES_RANGE, _switch_series, coordination_pairs

__all__ = ["FUNNEL_EXPRESSION", "FUNNEL_PARAMETERS", "OPENMM_DEFAULT_BOX_NM", "OPENMM_MISSING",
           "cv_expression", "cv_force", "default_box_message", "import_openmm", "read_system",
           "openmm_exact_reach_nm", "restraint_force", "switching_expression"]

#: nm: edge of the cubic box OpenMM gives a System whose box was never set.
OPENMM_DEFAULT_BOX_NM = 2.0

#: The refusal when openmm cannot be imported.
OPENMM_MISSING = ("exporting to OpenMM needs the openmm package, which is not installed here; "
                  "install it with pip install 'cvdesign[openmm]' (or pip install openmm)")

#: nm: length of the step along the funnel axis that gives the axis direction to
#: OpenMM's ``pointangle`` (any length below half the box height gives the same angle).
_AXIS_STEP_NM = 0.1

#: Energy of one funnel restraint, kJ/mol, for ``CustomCentroidBondForce`` with the ligand
#: as group 1 and the pocket as group 2. ``dist`` is the (periodic) distance of the two
#: centres and ``theta`` the angle between the pocket-to-ligand vector and the axis, so
#: ``z = dist cos(theta)`` and ``r = dist sin(theta)``; on the pocket centre itself (dist
#: exactly 0), where the angle has no direction, a point on the axis stands in for the
#: ligand centre (z = r = 0 either way).
FUNNEL_EXPRESSION = (
    "0.5*k*(max(r - R, 0)^2 + max(zlow - z, 0)^2 + max(z - zup, 0)^2); "
    "R = rcyl + tana*g; "
    "g = select(step(z - (zc + w)), 0, select(step(zc - w - z), zc - z, (zc + w - z)^2/(4*w))); "
    "z = dist*cos(theta); r = dist*sin(theta); "
    "theta = pointangle(select(dist, x1, x2 + h*ax), select(dist, y1, y2 + h*ay), "
    "select(dist, z1, z2 + h*az), x2, y2, z2, x2 + h*ax, y2 + h*ay, z2 + h*az); "
    f"dist = pointdistance(x1, y1, z1, x2, y2, z2); h = {_AXIS_STEP_NM!r}"
)

#: Per-bond parameters of :data:`FUNNEL_EXPRESSION`, in order: ``k``
#: (``wall_force_constant_kj_mol_nm2``, kJ/mol/nm^2), ``zlow``, ``zup`` (the walls, nm),
#: ``zc`` (``cone_end_z_nm``), ``w`` (``blend_half_width_nm``), ``tana``
#: (``tan(cone_half_angle_rad)``), ``rcyl`` (``cylinder_radius_nm``) and ``ax, ay, az``
#: (the axis, normalized).
FUNNEL_PARAMETERS = ("k", "zlow", "zup", "zc", "w", "tana", "rcyl", "ax", "ay", "az")


def _funnel_parameters(res):
    """The values of :data:`FUNNEL_PARAMETERS` for one funnel restraint entry."""
    axis = np.asarray(res["axis"], dtype=np.float64)
    axis = axis / np.linalg.norm(axis)  # as cvdesign.bias.funnel.funnel_energy does
    return [float(res["wall_force_constant_kj_mol_nm2"]), float(res["lower_wall_z_nm"]),
            float(res["upper_wall_z_nm"]), float(res["cone_end_z_nm"]),
            float(res["blend_half_width_nm"]), float(np.tan(res["cone_half_angle_rad"])),
            float(res["cylinder_radius_nm"])] + [float(v) for v in axis]


def import_openmm():
    """The ``openmm`` module, or a clear refusal when it is not installed.

    Returns
    -------
    module
        ``openmm``.

    Raises
    ------
    InputError
        openmm cannot be imported; the message says ``pip install 'cvdesign[openmm]'``.

    Examples
    --------
    >>> import_openmm().__name__
    'openmm'
    """
    try:
        import openmm
    except ImportError:
        raise InputError(OPENMM_MISSING) from None
    return openmm


def _num(value):
    """A float as Lepton reads it back exactly: ``repr``, in parentheses when negative."""
    text = repr(float(value))
    return f"({text})" if text.startswith("-") else text


def switching_expression(r0, n, m):
    """OpenMM expression of the rational switching function ``(1 - (r/r0)^n) / (1 - (r/r0)^m)``.

    The expression of one pair distance ``r`` (nm) for a ``CustomBondForce``,
    with the branches of :func:`cvdesign.geometry.switching_function` (so no
    branch divides 0 by 0): with ``x = r/r0`` and ``e = x - 1``,

    - ``(n/m) sum_j q_j e^j``, its Taylor series of order 6, where ``|e|
      max(m, 1) < 2e-3`` (r = r0 gives exactly n/m);
    - ``(1 - x^n) / (1 - x^m)`` below that range;
    - ``x^(n-m) (1 - x^-n) / (1 - x^-m)`` above it, which cannot overflow.

    OpenMM's ``select`` picks one branch, so the others' values (0/0 at r0)
    never reach the energy or the forces.

    Parameters
    ----------
    r0 : float
        Switching distance, nm, > 0.
    n, m : float
        Exponents, ``0 < n < m``.

    Returns
    -------
    str
        The expression, numbers written with all their digits.

    Examples
    --------
    >>> text = switching_expression(0.3, 6.0, 12.0)
    >>> text.split("; ")[1:]
    ['e = x - 1', 'x = r/0.3']
    >>> text.count("select(")
    2
    """
    r0, n, m = float(r0), float(n), float(m)
    q = _switch_series(n, m)
    series = _num(q[-1])
    for coefficient in reversed(q[:-1]):
        series = f"{_num(coefficient)} + e*({series})"
    below = f"(1 - x^{_num(n)})/(1 - x^{_num(m)})"
    above = f"x^{_num(n - m)}*(1 - x^{_num(-n)})/(1 - x^{_num(-m)})"
    return (f"select(step(abs(e)*{_num(max(m, 1.0))} - {_num(_SERIES_RANGE)}), "
            f"select(step(e), {above}, {below}), {_num(n / m)}*({series})); "
            f"e = x - 1; x = r/{_num(r0)}")


def cv_expression(document):
    """The CV as an OpenMM expression of its descriptors, and the descriptor of each variable.

    Parameters
    ----------
    document : dict
        A validated spec document (:meth:`cvdesign.Spec.to_dict`).

    Returns
    -------
    expression : str
        ``offset + factor_t*(transform_t(d_k) - center_t) + ...`` with
        ``factor_t = weight_t / scale_t``, numbers with all their digits.
    variables : list of (str, dict)
        ``("d0", descriptor), ("d1", descriptor), ...``: the descriptors the
        terms use, in the order of first use; unused descriptors are left out.

    Examples
    --------
    >>> doc = {"offset": 0.5, "descriptors": [{"id": "t", "kind": "dihedral"}],
    ...        "terms": [{"descriptor": "t", "transform": "cos", "center": 0.1,
    ...                   "scale": 2.0, "weight": -1.0},
    ...                  {"descriptor": "t", "transform": "sin", "center": 0.0,
    ...                   "scale": 1.0, "weight": 1.0}]}
    >>> expression, variables = cv_expression(doc)
    >>> expression
    '0.5 + (-0.5)*(cos(d0) - 0.1) + 1.0*(sin(d0) - 0.0)'
    >>> [(name, d["id"]) for name, d in variables]
    [('d0', 't')]
    """
    by_id = {d["id"]: d for d in document["descriptors"]}
    names = {}
    parts = [_num(document["offset"])]
    for term in document["terms"]:
        name = names.setdefault(term["descriptor"], f"d{len(names)}")
        value = {"identity": name, "cos": f"cos({name})", "sin": f"sin({name})"}[term["transform"]]
        factor = term["weight"] / term["scale"]
        parts.append(f"{_num(factor)}*({value} - {_num(term['center'])})")
    return " + ".join(parts), [(name, by_id[desc]) for desc, name in names.items()]


def _descriptor_force(openmm, desc, periodic):
    """The OpenMM force whose energy is the value of one descriptor."""
    kind = desc["kind"]
    if kind == "distance":
        force = openmm.CustomBondForce("r")
        force.addBond(*(int(a) for a in desc["atoms"]), [])
    elif kind == "angle":
        force = openmm.CustomAngleForce("theta")
        force.addAngle(*(int(a) for a in desc["atoms"]), [])
    elif kind == "dihedral":
        force = openmm.CustomTorsionForce("theta")
        force.addTorsion(*(int(a) for a in desc["atoms"]), [])
    elif kind == "center_distance":
        force = openmm.CustomCentroidBondForce(2, "distance(g1,g2)")
        for g, group in enumerate(desc["groups"]):
            weights = (desc["masses"][g] if desc["weighting"] == "mass"
                       else [1.0] * len(group))
            force.addGroup([int(a) for a in group], [float(w) for w in weights])
        force.addBond([0, 1], [])
    elif kind == "coordination":
        force = openmm.CustomBondForce(switching_expression(desc["r0"], desc["n"], desc["m"]))
        for i, j in coordination_pairs(*desc["groups"]):
            force.addBond(int(i), int(j), [])
    else:
        raise SpecError(f"descriptor {desc['id']!r} is of kind {kind!r}, which this version "
                        "cannot export to OpenMM; update cvdesign")
    force.setUsesPeriodicBoundaryConditions(periodic)
    force.setName(desc["id"])
    return force


def default_box_message(system):
    """A warning when a periodic `system`'s box is OpenMM's default, else None.

    A System whose box was never set has the default box, a cube of
    :data:`OPENMM_DEFAULT_BOX_NM` nm; with periodic boundary conditions every
    vector longer than half its edge is then wrapped without an error. Whether
    the box was set on purpose cannot be told from the System (its XML always
    holds box vectors), so this is a warning, not a refusal.

    Parameters
    ----------
    system : openmm.System

    Returns
    -------
    str or None
        The warning, or None for a System without periodic boundary conditions
        or with another box.

    Examples
    --------
    >>> openmm = import_openmm()
    >>> system = openmm.System()
    >>> force = openmm.CustomBondForce("r")
    >>> force.setUsesPeriodicBoundaryConditions(True)
    >>> _ = system.addForce(force)
    >>> default_box_message(system)[:60]
    'the openmm.System uses periodic boundary conditions, but its'
    >>> system.setDefaultPeriodicBoxVectors(openmm.Vec3(3, 0, 0), openmm.Vec3(0, 3, 0),
    ...                                     openmm.Vec3(0, 0, 3))  # a 3 nm cube, set
    >>> default_box_message(system) is None
    True
    """
    openmm = import_openmm()
    if not system.usesPeriodicBoundaryConditions():
        return None
    box = _default_box_nm(system, openmm)
    if not np.array_equal(box, OPENMM_DEFAULT_BOX_NM * np.eye(3)):
        return None
    edge = OPENMM_DEFAULT_BOX_NM
    return (f"the openmm.System uses periodic boundary conditions, but its box is OpenMM's "
            f"default, a {edge:g} nm cube, which a System has when no box was set: in that "
            f"box every distance longer than {edge / 2:g} nm is wrapped without an error. Set "
            "the simulation's box on the System (setDefaultPeriodicBoxVectors) before "
            "serializing it, or on the Context (setPeriodicBoxVectors) before the run; if the "
            f"box really is a {edge:g} nm cube, ignore this")


def _funnel_reach(document):
    """``(reach nm, where)`` of the spec's funnel restraint that reaches farthest from its
    pocket centre (:func:`cvdesign.bias.funnel.funnel_reach`), or None without a funnel."""
    from ..bias.funnel import funnel_reach

    reaches = [funnel_reach(r) for r in document.get("restraints") or []
               if r.get("kind") == "funnel"]
    return max(reaches) if reaches else None


def _default_box_nm(system, openmm):
    """The System's default box vectors as rows, nm."""
    nm = openmm.unit.nanometer
    return np.array([list(v.value_in_unit(nm)) for v in system.getDefaultPeriodicBoxVectors()],
                    dtype=np.float64)


def _check_funnel_reach(document, system, openmm):
    """Refuse a funnel restraint that reaches farther from the pocket than OpenMM's periodic
    displacements are exact: half the smallest of the diagonal elements ``a_x, b_y, c_z`` of
    the System's box (OpenMM keeps box vectors in its reduced form and takes the periodic
    image of a displacement one box vector at a time, c, then b, then a, which gives the
    nearest image only within that; OpenMM's documentation, from memory). Beyond it the
    image folds the ligand-pocket vector, and the restraint (and the funnel's CV) would push
    a ligand still inside the funnel. For a triclinic box this can be below what cvdesign's
    own evaluator, exact at any distance, allows (half the smallest height of the lattice's
    most compact cell: a rhombic dodecahedron of image distance d, written with a square xy
    face, gives c_z / 2 = 0.354 d against 0.408 d)."""
    farthest = _funnel_reach(document)
    if farthest is None:
        return
    reach, where = farthest
    half = openmm_exact_reach_nm(_default_box_nm(system, openmm))
    if reach > half:
        raise InputError(
            f"spec {document['name']!r}: the funnel reaches {reach:.4g} nm from the pocket "
            f"centre (its {where}), more than half the smallest of a_x, b_y and c_z of the "
            f"openmm.System's box ({half:.4g} nm), within which OpenMM's periodic "
            "displacements are exact: beyond it the periodic image folds the ligand's "
            "offset, and the restraint would push a ligand that is still inside the funnel. "
            f"Use a box whose a_x, b_y and c_z are each above {2 * reach:.4g} nm, or size a "
            "shorter funnel (cvdesign funnel --unbound-length)")


def openmm_exact_reach_nm(box_vectors_nm):
    """How far a displacement may reach, nm, for OpenMM's periodic image of it to be the
    nearest one: half the smallest of the diagonal elements ``a_x, b_y, c_z`` of box vectors
    in OpenMM's reduced form (rows; ``a = (a_x, 0, 0)``, ``b = (b_x, b_y, 0)``,
    ``c = (c_x, c_y, c_z)``), as OpenMM takes the image one box vector at a time (c, b,
    then a; OpenMM's documentation on periodic boxes, from memory).

    Parameters
    ----------
    box_vectors_nm : array-like of shape (3, 3)
        Box vectors as rows, nm.

    Returns
    -------
    float
        nm.

    Examples
    --------
    >>> openmm_exact_reach_nm([[4.0, 0, 0], [0, 5.0, 0], [0, 0, 6.0]])  # a brick: half its edge
    2.0
    >>> d = 2.5  # a rhombic dodecahedron of image distance d (xy-square form)
    >>> round(openmm_exact_reach_nm([[d, 0, 0], [0, d, 0], [d / 2, d / 2, d / 2 ** 0.5]]), 4)
    0.8839
    """
    box = np.asarray(box_vectors_nm, dtype=np.float64).reshape(3, 3)
    return 0.5 * float(min(box[0, 0], box[1, 1], box[2, 2]))


def _periodic_flag(openmm, document, periodic, system):
    """Whether the forces use periodic boundary conditions, from `periodic` and/or `system`."""
    n_atoms = document["topology"]["n_atoms"]
    name = document["name"]
    if periodic is not None and not isinstance(periodic, (bool, np.bool_)):
        raise InputError(f"periodic must be True or False; got {periodic!r}")
    if system is not None:
        if not isinstance(system, openmm.System):
            raise InputError(f"system must be an openmm.System; got {type(system).__name__}")
        count = system.getNumParticles()
        if count != n_atoms:
            raise InputError(
                f"the openmm.System has {count} particles, but spec {name!r} was made for a "
                f"topology of {n_atoms} atoms; export for the System of that topology, with "
                "the particles in topology order")
        uses = bool(system.usesPeriodicBoundaryConditions())
        if periodic is not None and bool(periodic) != uses:
            has = "uses a periodic box" if uses else "has no periodic box"
            raise InputError(
                f"periodic={bool(periodic)} but the openmm.System {has}; leave periodic out "
                "to follow the System")
        message = default_box_message(system)
        if message is not None:
            warnings.warn(message, UserWarning, stacklevel=4)
        if uses:  # (a funnel reaches past 1 nm: the default 2 nm cube never holds one)
            _check_funnel_reach(document, system, openmm)
        return uses
    farthest = _funnel_reach(document) if periodic else None
    if farthest is not None:
        reach = farthest[0]
        warnings.warn(
            f"spec {name!r}: the funnel reaches {reach:.4g} nm from the pocket centre; with "
            f"periodic=True and no System to check, make sure the Context's box has a_x, "
            f"b_y and c_z each above {2 * reach:.4g} nm (beyond half of them OpenMM's "
            "periodic image folds the ligand's offset), or pass the openmm.System as "
            "system= to have it checked",
            UserWarning, stacklevel=4)
    if periodic is None:
        raise InputError(
            "say whether the system has a periodic box: periodic=True (distances at their "
            "periodic images in the Context's box) or periodic=False (no box), or pass the "
            "openmm.System as system= to follow it; a wrong guess would give wrong values "
            "without an error")
    return bool(periodic)


def cv_force(document, periodic=None, *, system=None):
    """The spec's CV as an ``openmm.CustomCVForce`` whose energy is the CV value.

    See :meth:`cvdesign.Spec.to_openmm`, which calls this.

    Parameters
    ----------
    document : dict
        A validated spec document.
    periodic : bool or None, default=None
        True: the descriptors are measured at their periodic images in the
        Context's box; False: without a box. None: follow `system`.
    system : openmm.System or None, default=None
        The System the force is meant for: its particle count must be the
        spec's atom count, and `periodic` defaults to whether it uses periodic
        boundary conditions.

    Returns
    -------
    openmm.CustomCVForce
        Named ``cvdesign CV <name>``; its collective variables ``d0``, ...
        are the descriptor forces, each named by its descriptor id.

    Raises
    ------
    InputError
        openmm is missing, `periodic` is neither given nor taken from a
        System, or the System does not fit the spec.

    Examples
    --------
    >>> doc = {"name": "cv", "topology": {"n_atoms": 2}, "offset": 0.0,
    ...        "descriptors": [{"id": "d", "kind": "distance", "atoms": [0, 1]}],
    ...        "terms": [{"descriptor": "d", "transform": "identity", "center": 0.0,
    ...                   "scale": 1.0, "weight": 1.0}]}
    >>> force = cv_force(doc, periodic=False)
    >>> force.getEnergyFunction(), force.getCollectiveVariableName(0)
    ('0.0 + 1.0*(d0 - 0.0)', 'd0')
    """
    openmm = import_openmm()
    periodic = _periodic_flag(openmm, document, periodic, system)
    expression, variables = cv_expression(document)
    force = openmm.CustomCVForce(expression)
    for name, desc in variables:
        force.addCollectiveVariable(name, _descriptor_force(openmm, desc, periodic))
    force.setName(f"cvdesign CV {document['name']}")
    return force


def restraint_force(document, periodic=None, *, system=None):
    """The spec's restraints as one ``openmm.CustomCentroidBondForce``, energy in kJ/mol.

    See :meth:`cvdesign.Spec.restraint_to_openmm`, which calls this. Each
    funnel restraint is one bond between two groups (the ligand, the pocket;
    equal weights: geometric centres) with the per-bond parameters
    :data:`FUNNEL_PARAMETERS` in :data:`FUNNEL_EXPRESSION`.

    Parameters
    ----------
    document : dict
        A validated spec document with ``restraints``.
    periodic : bool or None, default=None
        As in :func:`cv_force`.
    system : openmm.System or None, default=None
        As in :func:`cv_force`.

    Returns
    -------
    openmm.CustomCentroidBondForce
        Named ``cvdesign restraints <name>``.

    Raises
    ------
    InputError
        openmm is missing, the spec has no restraints, or as in :func:`cv_force`.

    Examples
    --------
    >>> funnel = {"kind": "funnel", "groups": [[3], [0, 1, 2]], "axis": [0.0, 0.0, 1.0],
    ...           "lower_wall_z_nm": -0.2, "upper_wall_z_nm": 2.0, "cone_end_z_nm": 1.0,
    ...           "cone_half_angle_rad": 0.5, "cylinder_radius_nm": 0.2,
    ...           "blend_half_width_nm": 0.1, "wall_force_constant_kj_mol_nm2": 1000.0}
    >>> doc = {"name": "f", "topology": {"n_atoms": 4}, "restraints": [funnel]}
    >>> force = restraint_force(doc, periodic=False)
    >>> force.getNumGroups(), force.getNumBonds(), force.getNumPerBondParameters()
    (2, 1, 10)
    """
    openmm = import_openmm()
    restraints = document.get("restraints") or []
    if not restraints:
        raise InputError(f"spec {document['name']!r} has no restraints; only a spec with a "
                         "restraint (such as one 'cvdesign funnel' writes) has one to export")
    periodic = _periodic_flag(openmm, document, periodic, system)
    force = openmm.CustomCentroidBondForce(2, FUNNEL_EXPRESSION)
    for name in FUNNEL_PARAMETERS:
        force.addPerBondParameter(name)
    for k, res in enumerate(restraints):
        if res["kind"] != "funnel":
            raise SpecError(f"restraint {k} is of kind {res['kind']!r}, which this version "
                            "cannot export to OpenMM; update cvdesign")
        ligand, pocket = res["groups"]
        first = force.addGroup([int(a) for a in ligand], [1.0] * len(ligand))
        force.addGroup([int(a) for a in pocket], [1.0] * len(pocket))
        force.addBond([first, first + 1], _funnel_parameters(res))
    force.setUsesPeriodicBoundaryConditions(periodic)
    force.setName(f"cvdesign restraints {document['name']}")
    return force


def read_system(path, option="--system"):
    """Read an ``openmm.System`` from an OpenMM XML file (``XmlSerializer``).

    Parameters
    ----------
    path : str or os.PathLike
        The file, written by ``openmm.XmlSerializer.serialize(system)``.
    option : str, default="--system"
        How the file is named in messages.

    Returns
    -------
    openmm.System

    Raises
    ------
    InputError
        openmm is missing; the file is missing, unreadable, not OpenMM XML, or
        holds something other than a System.

    Examples
    --------
    >>> import os, tempfile
    >>> openmm = import_openmm()
    >>> system = openmm.System()
    >>> for _ in range(3):
    ...     _ = system.addParticle(12.0)
    >>> with tempfile.TemporaryDirectory() as tmp:
    ...     path = os.path.join(tmp, "system.xml")
    ...     with open(path, "w") as fh:
    ...         _ = fh.write(openmm.XmlSerializer.serialize(system))
    ...     read_system(path).getNumParticles()
    3
    """
    openmm = import_openmm()
    try:
        with open(path, encoding="utf-8") as fh:
            text = fh.read()
    except FileNotFoundError:
        raise InputError(f"{option} {str(path)!r} does not exist") from None
    except (OSError, UnicodeDecodeError) as exc:
        why = getattr(exc, "strerror", None) or exc
        raise InputError(f"cannot read {option} {str(path)!r}: {why}") from None
    if "<System" not in text:
        raise InputError(f"{option} {str(path)!r} holds no OpenMM System (no <System> element); "
                         "write it with openmm.XmlSerializer.serialize(system)")
    try:
        obj = openmm.XmlSerializer.deserialize(text)
    except Exception as exc:  # noqa: BLE001 - OpenMM raises its own exception types
        raise InputError(f"{option} {str(path)!r} is not an OpenMM XML file OpenMM can read "
                         f"({str(exc).strip() or type(exc).__name__}); write it with "
                         "openmm.XmlSerializer.serialize(system)") from None
    if not isinstance(obj, openmm.System):
        raise InputError(f"{option} {str(path)!r} holds an OpenMM {type(obj).__name__}, not a "
                         "System")
    return obj
