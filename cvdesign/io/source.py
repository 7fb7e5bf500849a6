"""Reading a topology and trajectories, grouped by metastable state, in chunks.

A :class:`Source` is a topology plus a list of *segments*: a trajectory file
with the state its frames belong to (a whole file, a frame range of it, or a
per-frame label array). Frames are read with :func:`mdtraj.iterload`, one chunk
at a time, so memory does not grow with trajectory length. Any format mdtraj
reads works (XTC, DCD, TRR, NetCDF, HDF5, PDB, ...).
"""

import contextlib
import ctypes
import hashlib
import importlib.util
import math
import numbers
import os
import sys
import threading
from dataclasses import dataclass, field
from pathlib import Path

import mdtraj as md
import numpy as np

from ..errors import InputError

__all__ = ["Source", "Segment", "Chunk", "load_topology", "select_atoms", "describe_selection",
           "file_frames", "file_sha256", "stores_time", "quiet_stdout", "check_box",
           "topology_box_nm", "missing_box_warning", "unboxed_files",
           "check_finite", "check_label_count", "every_atom", "default_selection_warnings",
           "MAX_COPIES"]

#: Residue names of one-atom residues treated as monatomic ions when choosing the default
#: solute (a residue 'CA' of one atom is calcium, whatever element a reader guessed).
_ION_NAMES = {
    "NA", "NA+", "SOD", "K", "K+", "POT", "CL", "CL-", "CLA", "MG", "MG2", "MG2+", "CA",
    "CA2", "CA2+", "CAL", "ZN", "ZN2", "ZN2+", "LI", "LI+", "RB", "RB+", "CS", "CS+", "F",
    "F-", "BR", "BR-", "I", "I-", "IOD", "CES", "MN", "MN2", "FE", "FE2", "FE3", "CU",
    "CU1", "CU2", "CO", "NI", "CD", "CD2", "SR", "BA", "HG", "AL",
}
#: Elements of one-atom residues treated as monatomic ions (any residue name).
_ION_ELEMENTS = {"Li", "Na", "K", "Rb", "Cs", "Mg", "Ca", "Sr", "Ba", "Zn", "Mn", "Fe",
                 "Co", "Ni", "Cu", "Cd", "Hg", "Al", "F", "Cl", "Br", "I"}
#: Water residue names beyond mdtraj's own list (which has HOH, WAT, SOL, TIP3, TIP4,
#: H2O, ...); water is also recognised by composition (:func:`_is_water`).
_WATER_NAMES = {"SPC", "SPCE", "TP3", "T3P", "TP4", "T4P", "T4E", "TP5", "T5P", "TIP5",
                "TIP3P", "TIP4P", "TIP5P", "OPC", "OPC3", "SWM4", "DOD", "D2O"}
#: A residue name with more than this many copies in the default selection, outside
#: proteins, nucleic acids and other chains, gets a warning: solvent (methanol, DMSO, ...)
#: or a membrane's lipids enlarge the pool by the square of their number.
MAX_COPIES = 20


#: Trajectory formats whose files store the simulation time of each frame. For the
#: others (DCD, PDB, ...) mdtraj numbers the frames instead, so times are unknown.
_TIMED_SUFFIXES = {".xtc", ".trr", ".h5", ".nc", ".ncdf", ".netcdf", ".dtr", ".lh5"}


def stores_time(path):
    """True when the trajectory format of `path` stores frame times (XTC, TRR, HDF5, NetCDF)."""
    return Path(path).suffix.lower() in _TIMED_SUFFIXES


#: Guards the redirection of file descriptor 1: threads reading at once (a threaded
#: executor) share one redirection, restored when the last of them leaves.
_QUIET_LOCK = threading.Lock()
_QUIET = {"depth": 0, "fd": None, "saved": None}


#: Environment variable: ``discard`` sends what the C readers print (see :func:`quiet_stdout`)
#: to /dev/null; anything else, or unset, to standard error (standard output stays clean,
#: and whatever another thread writes to standard output during a read is moved, not lost).
#: The command sets ``discard`` under ``-q`` (:func:`reader_output_discarded`) and ``show``
#: without it (:func:`reader_output_shown`); worker processes started meanwhile inherit it.
READER_OUTPUT_ENV = "CVDESIGN_READER_OUTPUT"


@contextlib.contextmanager
def _reader_output(mode):
    before = os.environ.get(READER_OUTPUT_ENV)
    os.environ[READER_OUTPUT_ENV] = mode
    try:
        yield
    finally:
        if before is None:
            os.environ.pop(READER_OUTPUT_ENV, None)
        else:
            os.environ[READER_OUTPUT_ENV] = before


def reader_output_discarded():
    """For the length of a block, discard what mdtraj's C readers print (e.g. the DCD
    reader's "dcdplugin) detected standard 32-bit DCD file ..."), here and in worker
    processes started during it; it is not shown, nor turned into warnings. The command
    enters it under ``-q``; from Python, enter it to silence those lines (by default they
    go to standard error). While it is active, anything another thread of the process
    writes to standard output during a read is discarded too."""
    return _reader_output("discard")


def reader_output_shown():
    """For the length of a block, send what mdtraj's C readers print to standard error,
    here and in worker processes started during it (the default; the command without
    ``-q`` enters it so that a discarding environment is not inherited)."""
    return _reader_output("show")


def _reader_sink():
    """(file descriptor for the C readers' output, whether it was opened here)."""
    if os.environ.get(READER_OUTPUT_ENV) != "discard":
        try:
            return sys.stderr.fileno(), False
        except (AttributeError, OSError, ValueError):
            pass
    return os.open(os.devnull, os.O_WRONLY), True


@contextlib.contextmanager
def quiet_stdout():
    """Send anything written to file descriptor 1 (by C readers) to standard error (to
    /dev/null within :func:`reader_output_discarded`, as under ``-q``).

    Some of mdtraj's compiled readers print diagnostics straight to the
    process's standard output, which would corrupt CSV written there. Safe
    to use from several threads at once: the first to enter redirects, the
    last to leave restores.
    """
    with _QUIET_LOCK:
        if _QUIET["depth"] == 0:
            # the C library's standard output is file descriptor 1, whatever sys.stdout is
            # (pytest's capture, a notebook's stream: objects without a descriptor)
            fd = 1
            _flush_python_stdout()
            _flush_c_stdio()  # (what was printed before the read goes where it was meant)
            try:
                saved = os.dup(fd)
            except OSError:  # descriptor 1 closed: nothing to protect
                fd = None
            if fd is not None:
                sink, opened = _reader_sink()
                os.dup2(sink, fd)
                if opened:
                    os.close(sink)
                _QUIET["fd"], _QUIET["saved"] = fd, saved
        _QUIET["depth"] += 1
    try:
        yield
    finally:
        with _QUIET_LOCK:
            _QUIET["depth"] -= 1
            if _QUIET["depth"] == 0 and _QUIET["fd"] is not None:
                _flush_python_stdout()
                _flush_c_stdio()
                os.dup2(_QUIET["saved"], _QUIET["fd"])
                os.close(_QUIET["saved"])
                _QUIET["fd"] = _QUIET["saved"] = None


def _flush_python_stdout():
    try:
        sys.stdout.flush()
    except (AttributeError, OSError, ValueError):
        pass


def _flush_c_stdio():
    """Flush the C library's stdio buffers: a C reader's ``printf`` to a standard output
    that is not a terminal (a pipe, a file, pytest's capture) is buffered, and would
    otherwise be written after the redirection of :func:`quiet_stdout` is undone."""
    try:
        libc = ctypes.CDLL(None)
        libc.fflush(None)
    except (OSError, AttributeError):  # no C library to reach (not seen on Linux or macOS)
        pass


def _quiet_iter(make):
    """Iterate over ``make()`` with :func:`quiet_stdout` active during every read."""
    with quiet_stdout():
        iterator = make()
    while True:
        with quiet_stdout():
            try:
                item = next(iterator)
            except StopIteration:
                return
        yield item


def check_box(traj, path, first_frame):
    """Raise InputError if a chunk's periodic box is not finite and positive-volume."""
    vecs = traj.unitcell_vectors
    if vecs is None:
        return
    vecs = vecs.astype(np.float64)
    finite = np.isfinite(vecs).all(axis=(1, 2))
    vol = np.zeros(vecs.shape[0])
    vol[finite] = np.abs(np.linalg.det(vecs[finite]))
    bad = ~finite | ~(vol > 1e-9)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise InputError(
            f"trajectory {str(path)!r} frame {int(first_frame[i])} has an invalid periodic box "
            f"(vectors {np.round(vecs[i], 4).tolist()} nm); check the file, or remove the box "
            "if the system is not periodic"
        )


#: Largest |coordinate| accepted, nm (0.1 mm: far beyond any simulation box or the drift of
#: an unwrapped run). Compressed XTC files store coordinates as integers; a NaN written to
#: one comes back as about -2147483.6 nm (the smallest 32-bit integer over the precision).
MAX_COORDINATE_NM = 1e5


def check_finite(traj, path, frames, atom_indices, topology):
    """Raise InputError naming file, frame and atom if a chunk holds a NaN or infinite
    coordinate, or one beyond :data:`MAX_COORDINATE_NM` (how XTC files store a NaN).

    Parameters
    ----------
    traj : mdtraj.Trajectory
        The chunk (all atoms, or `atom_indices`).
    path : path-like
        Its file, for the message.
    frames : ndarray of int
        0-based frame numbers of the chunk's frames within the file.
    atom_indices : ndarray of int or None
        Topology indices of the chunk's atoms (None: all atoms, in order).
    topology : mdtraj.Topology
        For the atom's name in the message.

    Examples
    --------
    >>> import mdtraj as md
    >>> top = md.Topology(); r = top.add_residue("LIG", top.add_chain())
    >>> for name in ("C1", "C2"):
    ...     _ = top.add_atom(name, md.element.carbon, r)
    >>> xyz = np.zeros((3, 2, 3), dtype=np.float32); xyz[2, 1, 0] = np.nan
    >>> check_finite(md.Trajectory(xyz, top), "run.xtc", np.arange(10, 13), None, top)
    Traceback (most recent call last):
    ...
    cvdesign.errors.InputError: trajectory 'run.xtc' frame 12 has a NaN or infinite coordinate for atom 1 (LIG0-C2): [nan, 0.0, 0.0] nm; the file is damaged or the simulation became unstable there. Check the file, or leave those frames out
    """
    xyz = traj.xyz
    # one reduction over the chunk (NaN propagates through max); only a chunk that fails
    # is searched element by element
    if xyz.size == 0:
        return
    if np.maximum(xyz.max(), -xyz.min()) <= MAX_COORDINATE_NM:
        return
    finite = np.isfinite(xyz).all(axis=2)
    bad = np.argwhere(~finite)
    what = "a NaN or infinite coordinate"
    if bad.size == 0:
        bad = np.argwhere((np.abs(xyz) > MAX_COORDINATE_NM).any(axis=2))
        what = (f"a coordinate beyond {MAX_COORDINATE_NM:g} nm (far outside any simulation box; "
                "an XTC file stores a NaN as about -2147483.6 nm)")
    f, a = (int(v) for v in bad[0])
    atom = int(a if atom_indices is None else atom_indices[a])
    raise InputError(
        f"trajectory {str(path)!r} frame {int(frames[f])} has {what} for "
        f"atom {atom} ({topology.atom(atom)}): {[float(v) for v in xyz[f, a]]} nm; the file is "
        "damaged or the simulation became unstable there. Check the file, or leave those "
        "frames out")


def check_label_count(segment, n_frames):
    """Raise InputError unless a labelled segment has one label per frame of its file.

    Parameters
    ----------
    segment : Segment
        A segment with a label array (others are accepted as they are).
    n_frames : int or None
        Frames in the file; None when reading found a frame past the last label
        before the end of the file.

    Examples
    --------
    >>> seg = Segment(Path("run.xtc"), labels=np.array(["a", "b"], dtype=object))
    >>> check_label_count(seg, 3)
    Traceback (most recent call last):
    ...
    cvdesign.errors.InputError: trajectory 'run.xtc' has more frames than its 2 labels; give one label per frame
    """
    if segment.labels is None:
        return
    n_labels = segment.labels.shape[0]
    if n_frames is None or n_frames > n_labels:
        raise InputError(f"trajectory {str(segment.path)!r} has more frames than its "
                         f"{n_labels} labels; give one label per frame")
    if n_frames != n_labels:
        raise InputError(f"trajectory {str(segment.path)!r} has {n_frames} frames but "
                         f"{n_labels} labels were given; give one label per frame")


#: The label of a frame in no state in a labels file (:func:`read_labels_file`).
NO_STATE_LABEL = "-"


def read_labels_file(path):
    r"""Per-frame state names from a labels file.

    One line per frame of the trajectory, frame 0 first: the state name of
    the frame (one word), or ``-`` for a frame in no state (between the basin
    cores: a transition frame); blank lines and lines starting with ``#`` are
    skipped.

    Parameters
    ----------
    path : path-like

    Returns
    -------
    ndarray of object, shape (n_frames,)
        State names, None for ``-``.

    Raises
    ------
    InputError
        A missing or unreadable file, a line of more than one word, no frame
        or no state named (naming the file and line).

    Examples
    --------
    >>> import tempfile, os
    >>> with tempfile.TemporaryDirectory() as d:
    ...     p = os.path.join(d, "run.labels")
    ...     _ = open(p, "w").write("# states of run.xtc\nopen\n-\nclosed\n")
    ...     read_labels_file(p).tolist()
    ['open', None, 'closed']
    """
    path = _check_file(path, "labels")
    try:
        text = path.read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"cannot read labels file {str(path)!r} ({exc}); give a text file "
                         f"with one state name (or {NO_STATE_LABEL!r}) per frame") from None
    labels = []
    for n, line in enumerate(text.splitlines(), 1):
        words = line.split()
        if not words or words[0].startswith("#"):
            continue
        if len(words) > 1:
            raise InputError(f"labels file {str(path)!r}, line {n}: {line.strip()!r} is more "
                             f"than one word; give one state name (or {NO_STATE_LABEL!r} for a "
                             "frame in no state) per line")
        if words[0] != NO_STATE_LABEL:
            _check_label_name(words[0], f"labels file {str(path)!r}, line {n}")
        labels.append(None if words[0] == NO_STATE_LABEL else words[0])
    if not any(x is not None for x in labels):
        raise InputError(f"labels file {str(path)!r} names no state"
                         + (" (it holds no frame)" if not labels else "")
                         + f"; give one state name (or {NO_STATE_LABEL!r}) per frame")
    return np.array(labels, dtype=object)


def _check_file(path, what):
    path = Path(path)
    if not path.exists():
        raise InputError(f"{what} file {str(path)!r} does not exist; check the path")
    if not path.is_file():
        raise InputError(f"{what} {str(path)!r} is not a regular file")
    return path


#: Names of the file formats mdtraj reads, by extension (for messages).
_FORMAT_NAMES = {
    ".pdb": "PDB", ".xtc": "XTC (GROMACS)", ".trr": "TRR (GROMACS)",
    ".gro": "GRO (GROMACS)", ".dcd": "DCD", ".nc": "NetCDF (AMBER)", ".ncdf": "NetCDF (AMBER)",
    ".netcdf": "NetCDF (AMBER)", ".h5": "HDF5 (mdtraj)", ".hdf5": "HDF5 (mdtraj)",
    ".lh5": "HDF5 (mdtraj, legacy)", ".psf": "PSF", ".prmtop": "PRMTOP (AMBER)",
    ".parm7": "PRMTOP (AMBER)", ".prm7": "PRMTOP (AMBER)", ".mol2": "MOL2",
    ".cif": "PDBx/mmCIF", ".pdbx": "PDBx/mmCIF", ".mmcif": "PDBx/mmCIF", ".xyz": "XYZ",
    ".lammpstrj": "LAMMPS dump", ".mdcrd": "AMBER ASCII trajectory",
    ".crd": "AMBER ASCII trajectory", ".inpcrd": "AMBER restart", ".rst7": "AMBER restart",
    ".ncrst": "AMBER NetCDF restart", ".restrt": "AMBER restart", ".dtr": "DESRES",
    ".stk": "DESRES", ".arc": "TINKER ARC", ".gsd": "GSD (HOOMD)", ".hoomdxml": "HOOMD XML",
    ".binpos": "BINPOS",
}
_HDF5_SUFFIXES = {".h5", ".hdf5", ".lh5"}
_PDB_SUFFIXES = {".pdb"}
#: Extensions of formats that hold atom names and residues (mdtraj reads topologies from them).
_TOPOLOGY_SUFFIXES = _HDF5_SUFFIXES | _PDB_SUFFIXES | {
    ".gro", ".psf", ".prmtop", ".parm7", ".prm7", ".mol2", ".cif", ".pdbx", ".mmcif", ".arc",
    ".gsd", ".hoomdxml"}


def _suffix(path):
    """Lower-case extension of `path`, looking through a final ``.gz``."""
    suffixes = [s.lower() for s in Path(path).suffixes]
    if len(suffixes) > 1 and suffixes[-1] == ".gz":
        return suffixes[-2]
    return suffixes[-1] if suffixes else ""


def _unreadable(path, what, exc=None, reason=None, todo=None):
    """InputError for a file mdtraj cannot read: the file, the format its extension
    suggests, why it failed and what to do (mdtraj's own message is often empty)."""
    ext = _suffix(path)
    fmt = _FORMAT_NAMES.get(ext)
    guessed = (f"format {fmt}, guessed from the extension {ext}" if fmt else
               f"mdtraj does not know the extension {ext or '(none)'!r}")
    detail = str(exc).strip().splitlines()[0].strip() if exc is not None and str(exc).strip() \
        else ""
    if len(detail) > 200:
        detail = detail[:200] + "..."
    kinds = ("PDB, GRO, PSF, PRMTOP, HDF5, ..." if what == "topology" else
             "XTC, TRR, DCD, NetCDF, HDF5, ...")
    if reason is None:
        if fmt is None:
            reason = "mdtraj picks the reader by the extension"
            todo = todo or f"rename the file to its format's extension ({kinds}) or convert it"
        elif what == "topology" and ext not in _TOPOLOGY_SUFFIXES:
            reason = f"{fmt} files hold coordinates only, not atom names and residues"
            todo = todo or (f"give a topology file ({kinds}) as the topology and this file as "
                            "a trajectory")
        elif ext in _PDB_SUFFIXES and (detail == "" or isinstance(exc, (IndexError, KeyError))):
            reason = "not a valid PDB file (no ATOM or HETATM records with coordinates were read)"
        elif detail:
            reason = f"mdtraj says: {detail}"
        else:
            reason = (f"mdtraj failed with {type(exc).__name__} and no message" if exc is not None
                      else "mdtraj could not read it")
    if todo is None:
        todo = (f"check that it is a complete {fmt} file (not truncated, not another format "
                f"under this extension), or convert it to another format mdtraj reads ({kinds})")
    return InputError(f"cannot read {what} file {str(path)!r} with mdtraj ({guessed}): "
                      f"{reason}; {todo}")


def _check_readable_format(path, what):
    """Refuse, before mdtraj prints a banner and fails, a format whose reader is missing."""
    if _suffix(path) in _HDF5_SUFFIXES and importlib.util.find_spec("tables") is None:
        other = "a PDB, PSF or PRMTOP topology" if what == "topology" else "XTC or DCD"
        raise _unreadable(path, what, reason="reading HDF5 needs PyTables, which is not "
                          "installed", todo=f"pip install tables, or convert the file to {other}")


#: Topology formats that can store a periodic box (PDB CRYST1, GRO box line, mdtraj HDF5).
_BOXED_TOPOLOGIES = (".pdb", ".pdb.gz", ".gro", ".h5", ".pdbx", ".cif")


def topology_box_nm(path):
    """The periodic box a topology file stores (PDB ``CRYST1``, GRO box line, ...), as box
    vectors (rows, nm), or None when it stores none (or the format has no box).

    Parameters
    ----------
    path : str or path-like or mdtraj.Topology or None
        A topology file; a :class:`mdtraj.Topology` or None has no box.

    Returns
    -------
    ndarray of shape (3, 3) or None

    Examples
    --------
    >>> from cvdesign.io.demo import demo_inputs
    >>> top, _ = demo_inputs()
    >>> topology_box_nm(top) is None  # the demo's PDB has no CRYST1 record
    True
    """
    if path is None or isinstance(path, md.Topology):
        return None
    name = str(path).lower()
    if not name.endswith(_BOXED_TOPOLOGIES):
        return None
    try:
        with quiet_stdout():
            frame = md.load_frame(str(path), 0)
    except Exception:  # (the topology itself was read: a file with no frame has no box)
        return None
    box = frame.unitcell_vectors
    if box is None or not np.all(np.isfinite(box)) or not abs(np.linalg.det(box[0])) > 0:
        return None
    return np.asarray(box[0], dtype=np.float64)


def unboxed_files(source):
    """The trajectory files of a source whose first frame stores no periodic box, when its
    topology file stores one (else none: nothing to compare with), in the order given.

    Parameters
    ----------
    source : Source

    Returns
    -------
    list of str

    Examples
    --------
    >>> from cvdesign.io.demo import demo_inputs
    >>> top, files = demo_inputs()
    >>> unboxed_files(Source.from_states(top, files))  # the demo's topology has no box
    []
    """
    if topology_box_nm(source.topology_path) is None:
        return []
    out = []
    for path in dict.fromkeys(str(seg.path) for seg in source.segments):
        try:
            with quiet_stdout():
                frame = md.load_frame(path, 0, top=source.topology)
        except Exception:  # (the reads proper name a file they cannot read)
            continue
        if frame.unitcell_vectors is None:
            out.append(path)
    return out


def missing_box_warning(topology_path, files):
    """The warning when a topology file stores a periodic box but the trajectory `files`
    store none, so their distances are taken without periodic images; None otherwise.

    Parameters
    ----------
    topology_path : str or path-like or None
    files : sequence of str
        Trajectory files whose frames hold no box.

    Returns
    -------
    str or None

    Examples
    --------
    >>> from cvdesign.io.demo import demo_inputs
    >>> top, files = demo_inputs()
    >>> missing_box_warning(top, files["closed"]) is None  # no box in the topology either
    True
    """
    if not files:
        return None
    box = topology_box_nm(topology_path)
    if box is None:
        return None
    names = ", ".join(repr(str(f)) for f in files)
    lengths = " x ".join(f"{v:.4g}" for v in np.linalg.norm(box, axis=1))
    return (f"topology file {str(topology_path)!r} has a periodic box ({lengths} nm), but "
            f"trajectory {names} stores{'' if len(files) == 1 else ' each'} none: distances "
            "in it are taken without periodic images, which is wrong if the run was "
            "periodic; give a trajectory format that stores the box (XTC, TRR, DCD with unit "
            "cells, NetCDF, ...), or ignore this if the run had no box")


def load_topology(path):
    """Load a topology with mdtraj, with a clear error on failure.

    Parameters
    ----------
    path : str or path-like or mdtraj.Topology
        Any file mdtraj reads a topology from (PDB, GRO, PSF, PRMTOP, HDF5, ...).
        A :class:`mdtraj.Topology` is returned unchanged.

    Returns
    -------
    mdtraj.Topology

    Raises
    ------
    InputError
        The file is missing, unreadable or holds no atoms; the message names
        the file, the format guessed from its extension, the reason and what
        to do.

    Examples
    --------
    >>> import os, tempfile
    >>> with tempfile.TemporaryDirectory() as tmp:
    ...     path = os.path.join(tmp, "junk.pdb")
    ...     with open(path, "w") as fh:
    ...         _ = fh.write("not a PDB file")
    ...     load_topology(path)  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    cvdesign.errors.InputError: cannot read topology file '...junk.pdb' with mdtraj (format PDB, ...
    """
    if isinstance(path, md.Topology):
        return path
    path = _check_file(path, "topology")
    _check_readable_format(path, "topology")
    try:
        with quiet_stdout():
            topology = md.load_topology(str(path))
    except Exception as exc:  # mdtraj raises many kinds; report them in one way
        raise _unreadable(path, "topology", exc) from exc
    if topology.n_atoms == 0:
        raise _unreadable(path, "topology", reason="it holds no atoms")
    return topology


def select_atoms(topology, selection=None):
    """Indices of the atoms a pool is built from.

    Parameters
    ----------
    topology : mdtraj.Topology
    selection : str, default=None
        An mdtraj selection string (e.g. ``"name CA"``, ``"resid 10 to 40 and
        not element H"``). None selects the heavy atoms of the solute: every
        atom that is not hydrogen, not water and not a monatomic ion. Water is
        a residue of a water name (mdtraj's list, SPC, TP3, OPC, ...) or of one
        oxygen, at most two hydrogens and otherwise only virtual sites; an ion a
        one-atom residue of an ion's name (a residue 'CA' of one atom is
        calcium) or element. Other small molecules (methanol, DMSO) and lipids
        stay: :func:`default_selection_warnings` names a residue with many
        copies.

    Returns
    -------
    ndarray of shape (n_selected,), dtype int
        Sorted 0-based atom indices.

    Raises
    ------
    InputError
        When the selection is invalid or matches no atoms.

    Examples
    --------
    >>> import mdtraj as md
    >>> top = md.Topology(); ch = top.add_chain(); r = top.add_residue("LIG", ch)
    >>> for name, el in [("C1", "carbon"), ("H1", "hydrogen"), ("O1", "oxygen")]:
    ...     _ = top.add_atom(name, md.element.get_by_symbol(el[0].upper()), r)
    >>> select_atoms(top).tolist()
    [0, 2]
    """
    if selection is None:
        idx = _default_selection(topology)[0]
        what = "the default selection (heavy atoms of the solute)"
    else:
        try:
            idx = np.asarray(topology.select(selection), dtype=np.intp)
        except Exception as exc:
            detail = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
            if len(detail) > 200:
                detail = detail[:200] + "..."
            raise InputError(f"invalid atom selection {selection!r}: {detail}") from exc
        what = f"selection {selection!r}"
    if idx.size == 0:
        raise InputError(
            f"{what} matches no atoms in a topology of {topology.n_atoms} atoms; "
            "check the atom and residue names (mdtraj selection syntax)"
        )
    return np.unique(idx)


def _is_hydrogen(atom):
    if atom.element is not None and atom.element.symbol != "VS":
        return atom.element.symbol == "H"
    return atom.name.upper().startswith("H")


def _is_virtual(atom):
    """An atom without element or mass (a virtual site, e.g. a 4-site water's charge)."""
    if atom.element is None or atom.element.symbol == "VS":
        return not atom.name.upper().startswith("H")
    return not (atom.element.mass or 0) > 0


def _is_water(residue):
    """Water by name (mdtraj's list and :data:`_WATER_NAMES`) or by composition: one
    oxygen, at most two hydrogens and otherwise only virtual sites."""
    if residue.is_water or residue.name.upper() in _WATER_NAMES:
        return True
    if residue.n_atoms > 6:
        return False
    oxygen = hydrogen = 0
    for atom in residue.atoms:
        if _is_hydrogen(atom):
            hydrogen += 1
        elif atom.element is not None and atom.element.symbol == "O":
            oxygen += 1
        elif not _is_virtual(atom):
            return False
    return oxygen == 1 and hydrogen <= 2


def _is_ion(residue):
    """A one-atom residue of an ion's name or element."""
    if residue.n_atoms != 1:
        return False
    element = next(iter(residue.atoms)).element
    return (residue.name.upper() in _ION_NAMES
            or (element is not None and element.symbol in _ION_ELEMENTS))


def _default_selection(topology):
    """The default selection's atoms and what it left out: ``(indices, {'water': Counter of
    residue names, 'ions': Counter of residue names, 'hydrogens': count})``."""
    from collections import Counter

    keep, water, ions, hydrogens = [], Counter(), Counter(), 0
    for residue in topology.residues:
        if _is_water(residue):
            water[residue.name] += 1
            continue
        if _is_ion(residue):
            ions[residue.name] += 1
            continue
        for atom in residue.atoms:
            if _is_hydrogen(atom):
                hydrogens += 1
            else:
                keep.append(atom.index)
    return (np.array(sorted(keep), dtype=np.intp),
            {"water": water, "ions": ions, "hydrogens": hydrogens})


def _left_out(topology):
    """What the default selection left out, as text (``''`` when nothing)."""
    _, out = _default_selection(topology)
    parts = []
    for key, what in (("water", "water"), ("ions", "ion")):
        counts = out[key]
        n = sum(counts.values())
        if n:
            names = ", ".join(sorted(counts)[:6]) + (", ..." if len(counts) > 6 else "")
            parts.append(f"{n} {what} residue{'s' if n != 1 else ''} ({names})")
    if out["hydrogens"]:
        parts.append(f"{out['hydrogens']} hydrogens")
    return "; left out: " + ", ".join(parts) if parts else ""


def default_selection_warnings(topology):
    """Warnings (as ``'warning: ...'`` notes) about residue names with more than
    :data:`MAX_COPIES` copies in the default selection, outside chains of bonded residues
    (proteins, nucleic acids, polymers): likely solvent or lipids, which the default keeps.

    Examples
    --------
    >>> import mdtraj as md
    >>> top = md.Topology(); ch = top.add_chain()
    >>> for k in range(25):
    ...     r = top.add_residue("MOH", ch, resSeq=k + 1)
    ...     _ = [top.add_atom(n, md.element.get_by_symbol(n[0]), r) for n in ("C1", "O1")]
    >>> print(default_selection_warnings(top)[0])
    warning: the default selection holds 25 copies of residue MOH (50 atoms), e.g. solvent or lipids, which enlarge the pool by the square of their number; if they do not matter, leave them out with --select (selection=), e.g. 'not resname MOH and not element H'
    """
    from collections import Counter

    chained = set()
    for bond in topology.bonds:
        ra, rb = bond[0].residue, bond[1].residue
        if ra.index != rb.index:
            chained.update((ra.index, rb.index))
    idx = _default_selection(topology)[0]
    copies, atoms = Counter(), Counter()
    seen = set()
    for i in idx:
        residue = topology.atom(int(i)).residue
        if residue.index in chained or residue.is_protein or residue.is_nucleic:
            continue
        atoms[residue.name] += 1
        if residue.index not in seen:
            seen.add(residue.index)
            copies[residue.name] += 1
    return [f"warning: the default selection holds {n} copies of residue {name} "
            f"({atoms[name]} atoms), e.g. solvent or lipids, which enlarge the pool by the "
            "square of their number; if they do not matter, leave them out with --select "
            f"(selection=), e.g. 'not resname {name} and not element H'"
            for name, n in sorted(copies.items()) if n > MAX_COPIES]


def _runs(values):
    """Runs of consecutive integers in a sorted array, as (first, last) pairs."""
    values = np.asarray(values, dtype=np.int64)
    if values.size == 0:
        return []
    cuts = np.flatnonzero(np.diff(values) != 1) + 1
    return [(int(r[0]), int(r[-1])) for r in np.split(values, cuts)]


def _listed(items, limit, total_runs):
    """At most `limit` items joined, the rest elided with the number of runs."""
    if total_runs <= limit:
        return ", ".join(items)
    return ", ".join(items[:limit - 1]) + f", ..., {items[-1]} ({total_runs} ranges)"


def describe_selection(topology, atoms, selection=None, *, limit=4):
    """One line saying which atoms a selection holds: how many, in which residues.

    mdtraj selections count atoms and residues from 0 (``index``, ``resid``),
    while residue names carry the file's own numbers (``resSeq``, often from
    1): the line gives both, so a selection that is off by one shows.

    Parameters
    ----------
    topology : mdtraj.Topology
    atoms : array-like of int
        0-based atom indices (as :func:`select_atoms` returns).
    selection : str, default=None
        The selection text, quoted at the start of the line; None: the default
        selection (heavy atoms of the solute).
    limit : int, default=4
        Most ranges of residues or indices listed; more are elided.

    Returns
    -------
    str
        E.g. ``"selection 'name CA': 42 atoms in 42 residues: LYS3-GLU44 (0-based
        mdtraj indices: atoms 10..650 in 42 ranges, resid 2..43)"``: residues
        by name and file number, consecutive residues of one chain as a range.
        For the default selection, what it left out follows (water and ion
        residues by name, hydrogens).

    Examples
    --------
    >>> import mdtraj as md
    >>> top = md.Topology(); ch = top.add_chain()
    >>> for n, name in enumerate(["ALA", "GLY", "SER", "HOH"], start=1):
    ...     r = top.add_residue(name, ch, resSeq=n)
    ...     for a in ["N", "CA", "C"]:
    ...         _ = top.add_atom(a, md.element.carbon, r)
    >>> describe_selection(top, top.select("name CA and resid 0 to 2"), "name CA and resid 0 to 2")
    "selection 'name CA and resid 0 to 2': 3 atoms in 3 residues: ALA1-SER3 (0-based mdtraj indices: atoms 1, 4, 7, resid 0..2)"
    >>> describe_selection(top, [3, 4, 5])
    'default selection (heavy atoms of the solute): 3 atoms in 1 residue: GLY2 (0-based mdtraj indices: atoms 3..5, resid 1); left out: 1 water residue (HOH)'
    """
    atoms = np.unique(np.asarray(atoms, dtype=np.int64))
    residues = sorted({topology.atom(int(i)).residue.index for i in atoms})
    res_runs = []  # consecutive residues of one chain
    for first, last in _runs(residues):
        start = first
        for k in range(first + 1, last + 1):
            if topology.residue(k).chain.index != topology.residue(k - 1).chain.index:
                res_runs.append((start, k - 1))
                start = k
        res_runs.append((start, last))

    def name(i):
        return str(topology.residue(i))

    def span(a, b, join):
        return str(a) if a == b else f"{a}{join}{b}"

    names = _listed([name(a) if a == b else f"{name(a)}-{name(b)}" for a, b in res_runs],
                    limit, len(res_runs))
    atom_runs = _runs(atoms)
    if len(atom_runs) <= limit:
        atom_text = ", ".join(span(a, b, "..") for a, b in atom_runs)
    else:
        atom_text = f"{int(atoms[0])}..{int(atoms[-1])} in {len(atom_runs)} ranges"
    resid_runs = _runs(residues)
    resid_text = _listed([span(a, b, "..") for a, b in resid_runs], limit, len(resid_runs))
    chains = {topology.residue(i).chain.index for i in residues}
    what = ("default selection (heavy atoms of the solute)" if selection is None
            else f"selection {selection!r}")
    left = _left_out(topology) if selection is None else ""
    n_res = len(residues)
    in_chains = f" of {len(chains)} chains" if len(chains) > 1 else ""
    return (f"{what}: {atoms.size} atom{'s' if atoms.size != 1 else ''} in {n_res} "
            f"residue{'s' if n_res != 1 else ''}{in_chains}: {names} (0-based mdtraj indices: "
            f"atoms {atom_text}, resid {resid_text}){left}")


def file_frames(path):
    """Number of frames in a trajectory file (through mdtraj's file object).

    Raises
    ------
    InputError
        When mdtraj cannot open the file or count its frames.

    Examples
    --------
    >>> from cvdesign.io.demo import demo_data_dir
    >>> file_frames(demo_data_dir() / "closed-1.xtc")
    2000
    """
    try:
        with quiet_stdout(), md.open(str(path)) as fh:
            return int(len(fh))
    except Exception as exc:
        raise InputError(f"cannot count the frames of trajectory {str(path)!r}: "
                         f"{str(exc).strip() or type(exc).__name__}; check the file") from exc


def file_sha256(path, block=1 << 20):
    """SHA-256 hex digest of a file, read in blocks."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while chunk := fh.read(block):
            h.update(chunk)
    return h.hexdigest()


def _same_bias(a, b):
    """Whether two (bias-energy file, column) pairs name the same bias (None, None: none)."""
    if (a[0] is None) != (b[0] is None):
        return False
    if a[0] is None:
        return True
    return os.path.samefile(a[0], b[0]) and a[1] == b[1]


@dataclass(frozen=True)
class Segment:
    """Frames of one trajectory file assigned to states.

    Attributes
    ----------
    path : pathlib.Path
        Trajectory file.
    state : str or None
        State of every frame of the segment; None when `labels` is given.
    start, stop : int or None
        Frame range ``[start, stop)`` of the file (None: from the first / to the last).
    labels : ndarray of shape (n_frames,) or None
        Per-frame state names for the whole file; frames labelled None or
        ``""`` are skipped.
    bias : ndarray of shape (n_frames,) or None
        Bias energy of every frame of the file, kJ/mol (a biased run; see
        :mod:`cvdesign.io.bias`); None for an unbiased run.
    bias_path : pathlib.Path or None
        The bias-energy file it was read from.
    bias_column : str or None
        The column of that file, as given (None: the default column).
    clock_bias : ndarray of shape (n_frames,) or None
        The bias each frame felt, kJ/mol, from the file's ``clock_bias``
        column, for the rescaled clock (None: the clock uses `bias`).
    bias_times : cvdesign.io.bias.BiasTimes or None
        The frame times of the bias-energy file's time column, compared with
        the trajectory's stored times (None: the file has no time column).
    """

    path: Path
    state: str | None = None
    start: int | None = None
    stop: int | None = None
    labels: np.ndarray | None = field(default=None, compare=False)
    bias: np.ndarray | None = field(default=None, compare=False, repr=False)
    bias_path: Path | None = None
    bias_column: str | None = None
    clock_bias: np.ndarray | None = field(default=None, compare=False, repr=False)
    bias_times: object = field(default=None, compare=False, repr=False)


@dataclass
class Chunk:
    """A block of consecutive frames of one file.

    Attributes
    ----------
    segment_index : int
        Index of the segment in :attr:`Source.segments`.
    trajectory : mdtraj.Trajectory
        The frames (all atoms, or the requested subset).
    frames : ndarray of shape (n,), dtype int
        0-based frame numbers within the file.
    states : ndarray of shape (n,), dtype int
        State index of each frame (into :attr:`Source.states`).
    """

    segment_index: int
    trajectory: md.Trajectory
    frames: np.ndarray
    states: np.ndarray


class Source:
    """A topology and trajectory files, grouped by state, read in chunks.

    Parameters
    ----------
    topology : str or path-like or mdtraj.Topology
        Topology file (or a loaded topology).
    chunk_size : int, default=500
        Frames read at a time.
    timestep : float, default=None
        Time between frames in ps for files whose format stores no times
        (DCD, PDB, ...), and for files whose stored times do not increase
        (all zero, as some writers store, or decreasing from the first frame):
        those times are then ignored, and :attr:`notes` says so. Files whose
        stored times increase keep their own: a `timestep` that agrees with them within
        their single precision is used, one that does not is refused (see
        :meth:`timestep`). Without it, a file whose stored
        times do not increase is refused by :meth:`timestep`.
    temperature : float, default=None
        Temperature of the biased runs in K, needed when a trajectory comes
        with its bias energies (``bias=`` of :meth:`add`): its frames are
        reweighted by ``exp(V / kT)`` (see :mod:`cvdesign.io.bias`).

    Attributes
    ----------
    notes : list of str
        What the source did that a reader should know (stored times replaced
        by the given `timestep`).

    Examples
    --------
    Two files per state from the Python API (the command line does the same
    with ``--state NAME FILE ...``)::

        src = Source.from_states("mol.pdb", {"closed": ["c1.xtc", "c2.xtc"],
                                              "open": ["o1.xtc", "o2.xtc"]})

    One trajectory with a per-frame label array::

        src = Source.from_labels("mol.pdb", "run.xtc", labels)

    A biased run that crossed between the states, with a per-frame label array
    and its bias energy per frame (kJ/mol), run at 300 K::

        src = Source("mol.pdb", temperature=300.0)
        src.add_labelled("biased.xtc", labels, bias="biased-energy.txt")
    """

    def __init__(self, topology, *, chunk_size=500, timestep=None, temperature=None):
        if timestep is not None and not (isinstance(timestep, (int, float)) and timestep > 0
                                         and math.isfinite(timestep)):
            raise InputError(f"timestep={timestep!r} must be a positive time in ps")
        if temperature is not None and not (
                isinstance(temperature, numbers.Real) and not isinstance(temperature, bool)
                and math.isfinite(temperature) and temperature > 0):
            raise InputError(f"temperature={temperature!r} must be a positive temperature in K "
                             "(of the biased runs)")
        self.temperature = None if temperature is None else float(temperature)
        self._reweighting = None
        self.default_timestep = None if timestep is None else float(timestep)
        self.topology_path = None if isinstance(topology, md.Topology) else str(topology)
        self.topology = load_topology(topology)
        if int(chunk_size) < 1:
            raise InputError(f"chunk_size={chunk_size!r} must be a positive number of frames")
        self.chunk_size = int(chunk_size)
        self.segments = []
        self.states = []
        self._checked = {}
        self._stored_steps = {}   # path -> (time of frame 0, time of frame 1) ps, or None
        self._time_notes = {}     # path -> note on stored times replaced by `timestep`

    # ------------------------------------------------------------------ building
    @classmethod
    def from_states(cls, topology, states, *, bias=None, bias_column=None, **kwargs):
        """Build a source from ``{state name: [trajectory files]}``.

        Parameters
        ----------
        topology : str or path-like or mdtraj.Topology
        states : mapping of str to sequence of path-like
            Files of each state, in the order the states should be reported.
        bias : mapping of path-like to path-like, default=None
            ``{trajectory: bias-energy file}`` for the biased runs among the
            files (see :meth:`add`; needs ``temperature=``).
        bias_column : int or str, default=None
            Column of every bias-energy file (see :meth:`add`).
        **kwargs
            Passed to the constructor.
        """
        src = cls(topology, **kwargs)
        bias = _bias_by_file(bias, [f for files in states.values() for f in
                                    ([files] if isinstance(files, (str, os.PathLike)) else files)])
        for name, files in states.items():
            if isinstance(files, (str, os.PathLike)):
                files = [files]
            if len(files) == 0:
                raise InputError(f"state {name!r} has no trajectory files; give at least one")
            for f in files:
                src.add(f, state=name, bias=bias.get(str(f)), bias_column=bias_column)
        return src

    @classmethod
    def from_labels(cls, topology, trajectory, labels, *, bias=None, bias_column=None,
                    **kwargs):
        """Build a source from one trajectory and a per-frame array of state names.

        Parameters
        ----------
        topology : str or path-like or mdtraj.Topology
        trajectory : path-like
            Trajectory file.
        labels : array-like of shape (n_frames,)
            State name (or integer code) of every frame of `trajectory`; frames
            labelled None or ``""`` are skipped.
        bias, bias_column : optional
            Bias-energy file of a biased run, and its column (see :meth:`add`;
            needs ``temperature=``).
        """
        src = cls(topology, **kwargs)
        src.add_labelled(trajectory, labels, bias=bias, bias_column=bias_column)
        return src

    def _add_state(self, name):
        name = str(name)
        if not name:
            raise InputError("a state name must not be empty")
        if name not in self.states:
            self.states.append(name)

    def add(self, path, state, *, frames=None, bias=None, bias_column=None):
        """Add a trajectory file (or a frame range of it) belonging to one state.

        Parameters
        ----------
        path : path-like
            Trajectory file.
        state : str
            State name.
        frames : tuple of (int or None, int or None), default=None
            Frame range ``(start, stop)`` in 0-based frames, stop excluded.
        bias : path-like, default=None
            Bias-energy file of a biased run: one bias energy (kJ/mol) per
            frame of the whole file (format: :mod:`cvdesign.io.bias`). Its
            frames are then reweighted by ``exp(V / kT)`` at the source's
            `temperature`, and its lagged pairs taken in rescaled time. A
            state may have biased and unbiased runs: the two groups are
            normalized apart and combined in proportion to their effective
            sample sizes (:mod:`cvdesign.io.bias`).
        bias_column : int or str, default=None
            Column of the bias-energy file (number from 1, or header name);
            None: its only column, or the one named ``bias``.

        Raises
        ------
        InputError
            For a bad frame range, a file given twice, and a bias-energy file
            that cannot be read, has another number of values than the
            trajectory has frames, or comes without a temperature (naming the
            file and line).
        """
        path = self._check_trajectory(path)
        energies = self._read_bias(path, bias, bias_column)
        start = stop = None
        if frames is not None:
            if not isinstance(frames, (tuple, list)) or len(frames) != 2:
                raise InputError(f"frames={frames!r} for {str(path)!r} must be a pair "
                                 "(start, stop) of 0-based frame numbers, stop excluded")
            start, stop = frames
            for name, v in (("start", start), ("stop", stop)):
                if v is not None and (not isinstance(v, numbers.Integral)
                                      or isinstance(v, bool) or v < 0):
                    raise InputError(f"frames={frames!r} for {str(path)!r}: {name} must be a "
                                     "non-negative integer or None")
            if start is not None and stop is not None and stop <= start:
                raise InputError(f"frame range {frames!r} for {str(path)!r} is empty; "
                                 "give (start, stop) with start < stop")
            start = None if start is None else int(start)
            stop = None if stop is None else int(stop)
        self._check_overlap(path, start, stop, str(state), energies[1:3])
        self._add_state(state)
        self.segments.append(Segment(path, str(state), start, stop, None, *energies))
        self._reweighting = None
        return self

    def _read_bias(self, path, bias, column):
        """(energies, bias path, column, clock energies or None, times or None) of a
        trajectory's bias-energy file, checked, or five None without one."""
        if bias is None:
            if column is not None:
                raise InputError(f"bias_column={column!r} for {str(path)!r} goes with a "
                                 "bias-energy file (bias=...)")
            return None, None, None, None, None
        from .bias import read_bias_file

        if not isinstance(bias, (str, os.PathLike)):
            raise InputError(
                f"bias= for {str(path)!r} is the bias-energy file (a path), not the energies "
                f"(got {type(bias).__name__}): label_basins takes the energies, Source.add and "
                "add_labelled the file they came from")
        if self.temperature is None:
            raise InputError(f"a bias-energy file ({str(bias)!r}) needs the temperature of the "
                             "biased run: give temperature=K to Source (--temperature K on the "
                             "command line)")
        energies, clock, times = read_bias_file(bias, column, with_clock=True, with_times=True)
        n_file = file_frames(path)
        if energies.size != n_file:
            raise InputError(f"bias-energy file {str(bias)!r} holds {energies.size} bias "
                             f"energies, but trajectory {str(path)!r} has {n_file} frames; give "
                             "one bias energy per frame of the whole trajectory, frame 0 first")
        if times is not None and stores_time(path):  # frames 0, 1 and the last: cheap, at once
            stored = self._stored_step(path)
            if stored is not None and stored[1] > stored[0]:  # (else: no real stored times)
                t0, t1, k, tk = stored  # frames 0, 1 and the last (k), read anyway
                frames = [0, 1] + ([k] if k > 1 else [])
                times.check(path, np.array(frames), np.array([t0, t1, tk][:len(frames)]))
        return energies, Path(bias), None if column is None else str(column), clock, times

    @property
    def biased(self):
        """bool : whether some trajectory comes with bias energies (a biased run)."""
        return any(seg.bias is not None for seg in self.segments)

    def reweighting(self):
        """Frame weights, effective sample sizes and rescaled clocks of the biased runs.

        Returns
        -------
        cvdesign.io.bias.Reweighting or None
            None when no trajectory is biased. Computed once (until the next
            :meth:`add`).

        Raises
        ------
        InputError
            When the frames of an unbiased run of a state with biased runs
            cannot be counted.
        """
        if not self.biased:
            return None
        if self._reweighting is None:
            from .bias import reweight

            self._reweighting = reweight(self.segments, self.states, self.temperature,
                                         count_frames=file_frames)
        return self._reweighting

    def _check_overlap(self, path, start, stop, state, bias=(None, None)):
        """Refuse frames of a file that were already given (under any spelling of its path),
        and frame ranges of one file given with different bias-energy files (`bias`: the
        file and column, both None for an unbiased run): one run felt one bias."""
        lo, hi = (start or 0), (math.inf if stop is None else stop)
        for seg in self.segments:
            if not os.path.samefile(seg.path, path):
                continue
            if state is not None and seg.labels is None and not _same_bias(
                    (seg.bias_path, seg.bias_column), bias):
                def said(b):
                    return ("no bias-energy file" if b[0] is None else
                            f"bias-energy file {str(b[0])!r}" +
                            ("" if b[1] is None else f" (column {b[1]!r})"))
                raise InputError(
                    f"trajectory {str(path)!r} is given for state {seg.state!r} with "
                    f"{said((seg.bias_path, seg.bias_column))} and for state {state!r} with "
                    f"{said(bias)}: the frames of one run felt one bias; give the same "
                    "bias-energy file (bias=...) for every frame range of the file")
            if seg.labels is not None or state is None:
                raise InputError(f"trajectory {str(path)!r} is given twice, once with a label "
                                 "array; give each file once")
            a, b = (seg.start or 0), (math.inf if seg.stop is None else seg.stop)
            if lo < b and a < hi:
                raise InputError(
                    f"trajectory {str(path)!r} is given twice with overlapping frames (for "
                    f"states {seg.state!r} and {state!r}); give each file once, or disjoint "
                    "frame ranges with frames=(start, stop)")

    def add_labelled(self, path, labels, *, bias=None, bias_column=None):
        """Add a trajectory file with a per-frame array of state names.

        Parameters
        ----------
        path : path-like
            Trajectory file.
        labels : array-like of shape (n_frames,)
            State name of every frame of the file; None, ``""`` or NaN marks a
            frame that belongs to no state. States are ordered by first
            appearance.
        bias, bias_column : optional
            Bias-energy file of a biased run, and its column (see :meth:`add`).

        Returns
        -------
        Source
            self, so calls can be chained.

        Raises
        ------
        InputError
            For labels that name no state, and, with a bias-energy file, a
            number of labels other than the trajectory's frames (naming both
            files and counts).
        """
        path = self._check_trajectory(path)
        energies = self._read_bias(path, bias, bias_column)
        self._check_overlap(path, None, None, None)
        labels = [None if _unlabelled(x) else str(x)
                  for x in np.asarray(labels, dtype=object).reshape(-1)]
        if energies[0] is not None and len(labels) != energies[0].size:
            raise InputError(f"labels for {str(path)!r} hold {len(labels)} labels, but the "
                             f"trajectory has {energies[0].size} frames (and its bias-energy "
                             f"file {str(bias)!r} {energies[0].size} values); give one label "
                             "per frame (a state name, or None between the states)")
        names = list(dict.fromkeys(x for x in labels if x is not None))
        if not names:
            raise InputError(f"labels for {str(path)!r} name no state; every frame is unlabelled")
        for n in names:
            _check_label_name(n, f"labels for {str(path)!r}")
        for n in names:
            self._add_state(n)
        self.segments.append(Segment(path, None, None, None, np.array(labels, dtype=object),
                                     *energies))
        self._reweighting = None
        return self

    def crossing_runs(self):
        """Segments whose per-frame labels visit two or more states (runs that crossed).

        Returns
        -------
        list of int
            Indices into :attr:`segments`, in order.
        """
        return [si for si, seg in enumerate(self.segments) if seg.labels is not None
                and len({x for x in seg.labels if x is not None}) >= 2]

    def runs_as_states(self, indices, names):
        """A source holding whole files of some segments, each file a state of its own.

        Every frame of each file belongs to its new state, the frames labelled
        None (between the states) included; bias energies, topology, chunk size,
        time step and temperature are kept, and the files are not checked again.
        With bias energies, each file's weights are then normalized over that
        file alone (:mod:`cvdesign.io.bias`: one constant per state).

        Parameters
        ----------
        indices : sequence of int
            Segments (indices into :attr:`segments`) of labelled files.
        names : sequence of str
            Name of the state of each.

        Returns
        -------
        Source

        Examples
        --------
        >>> import mdtraj as md
        >>> top = md.Topology(); _ = top.add_atom("C", md.element.carbon,
        ...     top.add_residue("X", top.add_chain()))
        >>> src = Source(top)
        >>> src.segments.append(Segment(Path("run.xtc"), None, labels=np.array(["a", None, "b"])))
        >>> src.crossing_runs(), src.runs_as_states([0], ["run 1"]).states
        ([0], ['run 1'])
        """
        out = Source(self.topology, chunk_size=self.chunk_size, timestep=self.default_timestep,
                     temperature=self.temperature)
        out.topology_path = self.topology_path
        for si, name in zip(indices, names):
            seg = self.segments[si]
            out._add_state(name)
            out.segments.append(Segment(seg.path, str(name), None, None, None, seg.bias,
                                        seg.bias_path, seg.bias_column, seg.clock_bias,
                                        seg.bias_times))
        out._checked, out._stored_steps = self._checked, self._stored_steps
        out._time_notes = self._time_notes
        return out

    def _check_trajectory(self, path):
        path = _check_file(path, "trajectory")
        key = str(path)
        if key in self._checked:
            return path
        _check_readable_format(path, "trajectory")
        try:
            with quiet_stdout():
                first = md.load_frame(str(path), 0, top=self.topology)
        except Exception as exc:
            if path.stat().st_size == 0:
                raise InputError(f"trajectory {str(path)!r} is empty (0 bytes); it has no "
                                 "frames") from exc
            n_file = _atoms_in_file(path)
            if n_file is not None and n_file != self.topology.n_atoms:
                raise InputError(
                    f"trajectory {str(path)!r} has {n_file} atoms but the topology"
                    f"{' ' + repr(self.topology_path) if self.topology_path else ''} has "
                    f"{self.topology.n_atoms}; give the topology the trajectory was written with"
                ) from exc
            if _suffix(path) == ".gro":
                raise _unreadable(path, "trajectory", exc, reason=(
                    "a .gro file is a text snapshot format (one model after another) and is not "
                    "read as a trajectory here"), todo=(
                    "convert it to XTC, e.g. python -c \"import mdtraj; mdtraj.load('run.gro')"
                    ".save_xtc('run.xtc')\", and give the XTC file")) from exc
            raise _unreadable(path, "trajectory", exc) from exc
        if first.n_atoms != self.topology.n_atoms:
            raise InputError(
                f"trajectory {str(path)!r} has {first.n_atoms} atoms but the topology has "
                f"{self.topology.n_atoms}; give the topology the trajectory was written with"
            )
        self._checked[key] = True
        return path

    # ------------------------------------------------------------------ reading
    @property
    def n_states(self):
        """int : number of states."""
        return len(self.states)

    def files(self):
        """Distinct trajectory files, in the order first added."""
        seen = []
        for s in self.segments:
            if s.path not in seen:
                seen.append(s.path)
        return seen

    def segment_frames(self, step=1):
        """``(segment, frames in its file, range of its frames taken with `step`)`` of every
        segment, each file's frames counted once (in its header).

        Examples
        --------
        >>> from cvdesign.io.demo import demo_inputs
        >>> top, files = demo_inputs()
        >>> seg, n, frames = next(Source.from_states(top, files).segment_frames(10))
        >>> n, len(frames)
        (2000, 200)
        """
        lengths = {}
        for seg in self.segments:
            key = str(seg.path)
            if key not in lengths:
                lengths[key] = file_frames(seg.path)
            n = lengths[key]
            yield seg, n, range(min(seg.start or 0, n),
                                n if seg.stop is None else min(seg.stop, n), step)

    def frames_to_read(self, step=1):
        """Frames a read of every `step`-th frame of each segment yields (for step 1, every
        frame with a state): the total of a progress bar over the source.

        Examples
        --------
        >>> from cvdesign.io.demo import demo_inputs
        >>> top, files = demo_inputs()
        >>> Source.from_states(top, files).frames_to_read()
        12000
        """
        total = 0
        for seg, n, frames in self.segment_frames(step):
            total += sum(x is not None for x in seg.labels[:n]) if seg.labels is not None \
                else len(frames)
        return total

    def iter_chunks(self, *, atom_indices=None, stride=1, chunk_size=None, progress=None):
        """Yield :class:`Chunk` objects over every segment, in order.

        Parameters
        ----------
        atom_indices : array-like of int, default=None
            Load only these atoms (the trajectory in each chunk then has
            ``len(atom_indices)`` atoms, in this order).
        stride : int, default=1
            Read every `stride`-th frame of each file.
        chunk_size : int, default=None
            Frames per chunk (default: the source's ``chunk_size``).
        progress : str, default=None
            Label of a progress bar advanced by the frames yielded (shown only
            while a display is active, :mod:`cvdesign.progress`); None: no bar.

        Yields
        ------
        Chunk
        """
        if progress is not None:
            from .. import progress as _progress

            with _progress.bar(progress, lambda: self.frames_to_read(int(stride))) as shown:
                for chunk in self.iter_chunks(atom_indices=atom_indices, stride=stride,
                                              chunk_size=chunk_size):
                    yield chunk
                    shown.update(len(chunk.frames))
            return
        state_index = {s: i for i, s in enumerate(self.states)}
        stride = int(stride)
        for si, seg in enumerate(self.segments):
            kwargs = {"top": self.topology, "chunk": int(chunk_size or self.chunk_size),
                      "stride": stride}
            later = None  # atoms to take from whole frames after reading
            if atom_indices is not None and not every_atom(atom_indices, self.topology):
                # (every atom in order: whole frames are read, much faster than a selection)
                kwargs["atom_indices"] = np.asarray(atom_indices, dtype=np.intp)
                if stride > 1 and _suffix(seg.path) == ".trr":
                    # mdtraj's TRR reader corrupts memory (a crash, no message) when given a
                    # stride and an atom subset together: read whole frames, then the atoms
                    later = kwargs.pop("atom_indices")
                    subset = self.topology.subset(later)
            frame0 = 0
            n_seen = 0
            try:
                iterator = _quiet_iter(lambda: md.iterload(str(seg.path), **kwargs))
                for traj in iterator:
                    if later is not None:  # (the atoms in the order asked for, as the
                        # formats that read a subset give them)
                        traj = md.Trajectory(traj.xyz[:, later], subset, time=traj.time,
                                             unitcell_lengths=traj.unitcell_lengths,
                                             unitcell_angles=traj.unitcell_angles)
                    n = traj.n_frames
                    frames = frame0 + stride * np.arange(n)
                    frame0 += stride * n
                    n_seen = frames[-1] + 1 if n else n_seen
                    mask = np.ones(n, dtype=bool)
                    if seg.start is not None:
                        mask &= frames >= seg.start
                    if seg.stop is not None:
                        mask &= frames < seg.stop
                    if seg.labels is not None:
                        if frames.size and frames[-1] >= seg.labels.shape[0]:
                            check_label_count(seg, None)
                        labs = seg.labels[frames]
                        mask &= np.array([x is not None for x in labs], dtype=bool)
                        codes = np.array(
                            [state_index[x] if x is not None else -1 for x in labs], dtype=np.intp
                        )
                    else:
                        codes = np.full(n, state_index[seg.state], dtype=np.intp)
                    if not mask.any():
                        if seg.stop is not None and frames.size and frames[0] >= seg.stop:
                            break
                        continue
                    sel = np.flatnonzero(mask)
                    sub = traj if sel.size == n else traj[sel]
                    check_box(sub, seg.path, frames[sel])
                    check_finite(sub, seg.path, frames[sel],
                                 kwargs.get("atom_indices", later), self.topology)
                    yield Chunk(si, sub, frames[sel], codes[sel])
            except InputError:
                raise
            except Exception as exc:
                raise read_error(seg.path, exc, frame0,
                                 frame0 + stride * (kwargs["chunk"] - 1)) from exc
            if seg.labels is not None and stride == 1:
                check_label_count(seg, n_seen)

    @property
    def notes(self):
        """list of str : what the source did that a reader should know."""
        return list(self._time_notes.values())

    def _stored_step(self, path):
        """Stored times (ps) of a file: ``(t0, t1, k, tk)``, frames 0, 1 and k (its last
        frame, k = 1 when that cannot be read cheaply), or None (unreadable, one frame)."""
        key = str(path)
        if key not in self._stored_steps:
            try:
                with quiet_stdout():
                    first = next(md.iterload(key, top=self.topology, chunk=2, atom_indices=[0]))
            except Exception:
                first = None
            if first is None or first.n_frames < 2:
                self._stored_steps[key] = None
            else:
                t0, t1 = float(first.time[0]), float(first.time[1])
                k, tk = 1, t1
                try:  # the last frame, through the file's frame offsets (no frame between)
                    n = file_frames(key)
                    if n > 2:
                        with quiet_stdout():
                            last = md.load_frame(key, n - 1, top=self.topology, atom_indices=[0])
                        k, tk = n - 1, float(last.time[0])
                except Exception:
                    pass
                self._stored_steps[key] = (t0, t1, k, tk)
        return self._stored_steps[key]

    def _stored_spacing(self, path):
        """Frame spacing of a file's increasing stored times and its uncertainty, both ps.

        Times are stored in single precision: each is within half a float32 spacing
        (:func:`float32_resolution`) of the true time, so a difference of two is within one
        spacing at the larger time. Far from zero that is a large part of a step (0.0625 ps
        at 10^6 ps), so the spacing is taken over the whole file, from its first to its last
        frame, when that agrees with the first two frames; otherwise (a file not evenly
        spaced, refused later by :class:`cvdesign.pipeline.timing.EvenSpacingPass`) from
        the first two.
        """
        t0, t1, k, tk = self._stored_step(path)
        step, res = t1 - t0, float32_resolution(max(abs(t0), abs(t1)))
        if k > 1:
            whole = (tk - t0) / k
            whole_res = float32_resolution(max(abs(t0), abs(tk))) / k
            if abs(whole - step) <= res + whole_res:
                step, res = whole, whole_res
        return step, res

    def timestep_resolution(self, segment_index):
        """Uncertainty (ps) of :meth:`timestep` from the single precision of stored times;
        0.0 for a given time step (a format without times, or stored times replaced or
        confirmed by the given `timestep`)."""
        seg = self.segments[segment_index]
        if (not stores_time(seg.path) or self.default_timestep is not None
                or self._stored_step(seg.path) is None
                or not self.stored_times_increase(segment_index)):
            return 0.0
        return self._stored_spacing(seg.path)[1]

    def stored_times_increase(self, segment_index):
        """False when a segment's file stores times that do not increase (all zero, as some
        writers store, or decreasing), judged from its first two frames; else True."""
        seg = self.segments[segment_index]
        times = self._stored_step(seg.path) if stores_time(seg.path) else None
        return times is None or times[1] > times[0]

    def stored_times_ignored(self, segment_index):
        """True when a segment's file stores times that do not increase and `timestep` replaces them."""
        seg = self.segments[segment_index]
        if not stores_time(seg.path) or self.default_timestep is None:
            return False
        times = self._stored_step(seg.path)
        return times is not None and not times[1] > times[0]

    def timestep(self, segment_index):
        """Time between the frames of a segment's file, in ps.

        From the file's stored times: their mean spacing from the first to the last frame
        (from the first two when those disagree), within the single precision of the stored
        times (:func:`float32_resolution` at the largest, divided by the frames between),
        rounded to the number with the fewest significant digits within that uncertainty
        (:func:`shortest_decimal`; time steps are round numbers in practice, common
        practice): 0.2 ps for times from 10^6 ps stored 0.1875 or 0.25 ps apart. A given
        `timestep` that agrees with the stored spacing within that uncertainty is used
        as it is. For a format that stores no times (see :func:`stores_time`), and for a
        file whose stored times do not increase (then noted in :attr:`notes`), the
        source's `timestep`; None when a format that stores no times has no `timestep`
        given, and for a single frame.

        Raises
        ------
        InputError
            When the file's stored times do not increase (all zero, as some
            writers store, or decreasing) and no `timestep` was given; when a given
            `timestep` disagrees with increasing stored times; when the stored times are
            too coarse (far from zero, few frames) to know the spacing to 1 % and no
            `timestep` was given.
        """
        seg = self.segments[segment_index]
        if not stores_time(seg.path):
            return self.default_timestep
        times = self._stored_step(seg.path)
        if times is None:
            return None
        t0, t1 = times[:2]
        if t1 > t0:
            step, res = self._stored_spacing(seg.path)
            near = max(abs(t0), abs(times[3]))
            stored = (f"stores frames {step:.7g} ps apart (to within {res:.2g} ps: its times, "
                      f"up to {near:g} ps, are stored in single precision)")
            given = self.default_timestep
            if given is not None:
                if abs(given - step) <= res * (1 + 1e-6) + 1e-9 * step:
                    return given
                if not any(not stores_time(other.path) for other in self.segments):
                    raise InputError(
                        f"trajectory {str(seg.path)!r} {stored}, but the given time between "
                        f"frames (--frame-step-ps; timestep= in the Python API) is {given:g} "
                        "ps; a file whose stored times increase keeps them, and no file here "
                        "stores no times: give its own spacing, or leave --frame-step-ps out "
                        "(it is for formats without times and for stored times that do not "
                        "increase)")
                # the given spacing is for the files without times (say DCD beside XTC of
                # another spacing): this file keeps its own, and the notes say so
                self._time_notes.setdefault(
                    str(seg.path),
                    f"trajectory {seg.path.name} {stored}: it keeps its own spacing; the given "
                    f"time between frames, {given:g} ps, is used for the files that store no "
                    "times")
            if not res <= TIMESTEP_UNCERTAINTY * step:
                raise InputError(
                    f"trajectory {str(seg.path)!r} {stored}: the time between its frames is "
                    "not known to 1 % (times far from zero in too few frames); give it in ps "
                    "with --frame-step-ps (timestep= in the Python API)")
            return shortest_decimal(step - res, step + res, step)
        what = (f"the same time ({t0:g} ps) for its first two frames" if t1 == t0 else
                f"times that do not increase (frame 0 at {t0:g} ps, frame 1 at {t1:g} ps)")
        if self.default_timestep is None:
            raise InputError(
                f"trajectory {str(seg.path)!r} stores {what}, so the time between its frames "
                "is unknown (some writers store no real times); give the time between frames "
                "in ps (--frame-step-ps; timestep= in the Python API), which then replaces the "
                "stored times")
        self._time_notes.setdefault(
            str(seg.path),
            f"trajectory {seg.path.name} stores {what}; they are ignored and the given time "
            f"between frames, {self.default_timestep:g} ps, is used instead")
        return self.default_timestep


#: Largest uncertainty of a frame spacing taken from stored times, relative to it: beyond
#: it the spacing must be given (``--frame-step-ps``).
TIMESTEP_UNCERTAINTY = 1e-2


def float32_resolution(t):
    """Spacing of single-precision numbers at `t` (ps for a time): a time stored in single
    precision is within half of it of the true time.

    Examples
    --------
    >>> float32_resolution(1e6), float32_resolution(1e4)
    (0.0625, 0.0009765625)
    """
    return float(np.spacing(np.float32(abs(t))))


def shortest_decimal(lo, hi, near):
    """The number in ``[lo, hi]`` (``0 < lo <= hi``) with the fewest significant decimal
    digits; of several, the one nearest `near`.

    Examples
    --------
    >>> shortest_decimal(0.1998, 0.2004, 0.2001), shortest_decimal(0.12375, 0.12625, 0.125)
    (0.2, 0.125)
    """
    top = math.floor(math.log10(hi))
    for e in range(top, top - 17, -1):
        k_lo = math.ceil(lo / 10.0**e - 1e-9)
        k_hi = math.floor(hi / 10.0**e + 1e-9)
        if k_lo <= k_hi:
            k = min(max(round(near / 10.0**e), k_lo), k_hi)
            return float(f"{k}e{e}")
    return float(near)


def read_error(path, exc, frame, last):
    """The error for an exception of mdtraj's reader while reading frames `frame` to `last`
    (0-based, inclusive: the chunk being read) of `path`.

    The XDR readers (XTC, TRR) say only "XTC read error: Float" for a file that ends inside
    a frame: that is said in words. A file cut exactly between frames cannot be told from a
    complete one (the formats store no frame count and no end mark).

    Examples
    --------
    >>> print(read_error("run.xtc", OSError("XTC read error: Float"), 500, 999))  # no such file
    trajectory 'run.xtc' could not be read in frames 500 to 999 (XTC read error: Float): it ends inside a frame (was it truncated, or is it still being written?); check the file, or use a complete copy
    """
    detail = str(exc).strip() or type(exc).__name__
    if detail.startswith(("XTC read error", "TRR read error")):
        try:  # the chunk may reach beyond the frames the file's offsets count
            last = min(last, max(frame, file_frames(path) - 1))
        except InputError:
            pass
        where = f"at frame {frame}" if last <= frame else f"in frames {frame} to {last}"
        return InputError(f"trajectory {str(path)!r} could not be read {where} "
                          f"({detail}): it ends inside a frame (was it truncated, or is it "
                          "still being written?); check the file, or use a complete copy")
    return InputError(f"error while reading trajectory {str(path)!r}: {detail}")


def every_atom(atom_indices, topology):
    """True when `atom_indices` are 0, 1, ..., n_atoms - 1: every atom, in order.

    Readers then read whole frames: mdtraj's readers select atoms frame by frame,
    which is much slower (2.5x for DCD) even when every atom is asked for.

    Examples
    --------
    >>> top = md.Topology(); r = top.add_residue("X", top.add_chain())
    >>> for name in ("C1", "C2"):
    ...     _ = top.add_atom(name, md.element.carbon, r)
    >>> every_atom([0, 1], top), every_atom([1], top)
    (True, False)
    """
    a = np.asarray(atom_indices).reshape(-1)
    return a.size == topology.n_atoms and np.array_equal(a, np.arange(a.size))


def _bias_by_file(bias, files):
    """``{str(trajectory as given): bias file}`` from a mapping keyed by any spelling of the
    trajectories' paths; refuses a key that names none of them."""
    if not bias:
        return {}
    out = {}
    for traj, bias_file in bias.items():
        match = [f for f in files if Path(f).exists() and Path(traj).exists()
                 and os.path.samefile(f, traj)]
        if not match:
            raise InputError(f"bias-energy file {str(bias_file)!r} is given for trajectory "
                             f"{str(traj)!r}, which is not among the trajectories of the states")
        for f in match:
            out[str(f)] = bias_file
    return out


#: Texts that a label written from Python's None or a float NaN becomes (str(None), "nan"):
#: refused as state names, which would make a state of the frames between the states.
_NOT_A_STATE = {"none", "nan", "null"}


def _check_label_name(name, where):
    """Refuse a label that is a no-state marker written as text (``'None'``, ``'nan'``)."""
    if str(name).strip().lower() in _NOT_A_STATE:
        raise InputError(
            f"{where}: label {name!r} is not taken as a state name: it is what a frame in no "
            f"state becomes when None or NaN is written as text (e.g. labels.astype(str)), "
            f"and the frames between the states would become a state of their own. Mark "
            f"such frames {NO_STATE_LABEL!r} in a labels file, or None in Python; rename a "
            "state that is really called so")


def _unlabelled(x):
    """True for a label that marks a frame as belonging to no state (None, "", NaN)."""
    if x is None:
        return True
    if isinstance(x, str):
        return x == ""
    try:
        return isinstance(x, numbers.Real) and math.isnan(x)
    except TypeError:
        return False


def _atoms_in_file(path):
    """Atom count stored in a trajectory file, or None if it cannot be found."""
    try:
        with quiet_stdout(), md.open(str(path)) as fh:
            out = fh.read(1) if not hasattr(fh, "read_as_traj") else None
            if out is None:
                out = fh.read(n_frames=1)
            xyz = out[0] if isinstance(out, tuple) else out
            return int(np.asarray(xyz).shape[1])
    except Exception:
        return None
