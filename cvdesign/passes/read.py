"""Raw coordinates of a frame range through mdtraj's file objects, checked chunk by chunk.

For the common simulation formats (XTC, TRR, DCD, NetCDF) frames are read
with ``mdtraj.open(path)``, ``seek`` and ``read(n, atom_indices=...)``: no
topology subset is built per chunk (``mdtraj.iterload(atom_indices=...)``
builds one for every chunk). Other formats go through ``mdtraj.iterload``
and keep the requested atoms. Every chunk goes through the source's checks
(:func:`cvdesign.io.source.check_box`, :func:`cvdesign.io.source.check_finite`).
"""

import mdtraj as md
import numpy as np
from mdtraj.formats import (DCDTrajectoryFile, NetCDFTrajectoryFile, TRRTrajectoryFile,
                            XTCTrajectoryFile)
from mdtraj.utils import in_units_of

from ..errors import InputError
from ..io.source import (check_box, check_finite, every_atom, file_frames, quiet_stdout,
                         read_error, stores_time)

__all__ = ["file_frames", "read_chunks", "RawChunk"]


def _xtc(out):
    return out[0], out[1], out[3], None, None


def _dcd(out):
    return out[0], None, None, out[1], out[2]


def _netcdf(out):
    return out[0], out[1], None, out[2], out[3]


#: file class -> how its ``read`` output maps to (xyz, time, box vectors, lengths, angles)
_RAW = ((XTCTrajectoryFile, _xtc), (TRRTrajectoryFile, _xtc), (DCDTrajectoryFile, _dcd),
        (NetCDFTrajectoryFile, _netcdf))


class RawChunk:
    """Consecutive frames of one file, the selected atoms only.

    Attributes
    ----------
    frames : ndarray of int64
        Absolute frame numbers in the file.
    trajectory : mdtraj.Trajectory
        Coordinates (nm) of the selected atoms, unit cell (nm) when the file
        has one, no topology.
    time : ndarray of float or None
        Stored times, ps (None for formats that store none).
    """

    __slots__ = ("frames", "trajectory", "time")

    def __init__(self, frames, trajectory, time):
        self.frames, self.trajectory, self.time = frames, trajectory, time

    def take(self, rows):
        """The chunk restricted to `rows` (an index array)."""
        t = self.trajectory
        sub = md.Trajectory(np.ascontiguousarray(t.xyz[rows]), None)
        if t.unitcell_vectors is not None:
            sub.unitcell_vectors = t.unitcell_vectors[rows]
        return RawChunk(self.frames[rows], sub, None if self.time is None else self.time[rows])


def _trajectory(xyz, vectors, lengths, angles, unit):
    xyz = in_units_of(np.ascontiguousarray(xyz, dtype=np.float32), unit, "nanometers",
                      inplace=True)
    traj = md.Trajectory(xyz, None)
    if vectors is not None:
        traj.unitcell_vectors = np.asarray(vectors, dtype=np.float32)
    elif lengths is not None:
        traj.unitcell_lengths = in_units_of(np.asarray(lengths, dtype=np.float32), unit,
                                            "nanometers")
        traj.unitcell_angles = np.asarray(angles, dtype=np.float32)
    return traj


def _raw_chunks(fh, layout, start, stop, atoms, chunk_frames, timed):
    fh.seek(start)
    frame = start
    while frame < stop:
        n = min(chunk_frames, stop - frame)
        with quiet_stdout():
            out = fh.read(n, atom_indices=atoms)
        xyz, time, vectors, lengths, angles = layout(out)
        got = xyz.shape[0]
        if got == 0:
            return
        traj = _trajectory(xyz, vectors, lengths, angles, fh.distance_unit)
        yield RawChunk(np.arange(frame, frame + got, dtype=np.int64), traj,
                       np.asarray(time, dtype=np.float64) if timed and time is not None
                       else None)
        frame += got


def _iterload_chunks(path, topology, start, stop, atoms, chunk_frames, timed):
    # mdtraj.iterload ignores `skip` for some formats (PDB): count frames from the first
    first = 0
    it = md.iterload(str(path), top=topology, chunk=int(chunk_frames))
    while first < stop:
        with quiet_stdout():
            traj = next(it, None)
        if traj is None or traj.n_frames == 0:
            return
        a, b = max(start, first) - first, min(stop, first + traj.n_frames) - first
        if b > a:
            sub = md.Trajectory(np.ascontiguousarray(traj.xyz[a:b][:, atoms]), None)
            if traj.unitcell_vectors is not None:
                sub.unitcell_vectors = traj.unitcell_vectors[a:b]
            yield RawChunk(np.arange(first + a, first + b, dtype=np.int64), sub,
                           np.asarray(traj.time[a:b], dtype=np.float64) if timed else None)
        first += traj.n_frames


def read_chunks(path, start, stop, atom_indices, topology, *, chunk_frames=500, select=None):
    """Read frames ``[start, stop)`` of a file in chunks, checked.

    Parameters
    ----------
    path : path-like
    start, stop : int
        Absolute frame range.
    atom_indices : ndarray of int
        Atoms to read (topology indices, sorted).
    topology : mdtraj.Topology
        Full topology (for the fallback reader and the messages).
    chunk_frames : int, default=500
        Frames per read.
    select : callable, default=None
        ``select(frames) -> bool mask`` of the frames to keep (frames outside a
        state are dropped before the checks, as :meth:`Source.iter_chunks`
        does); None keeps every frame.

    Yields
    ------
    RawChunk
        The kept frames of each chunk (chunks with none kept are skipped),
        after :func:`~cvdesign.io.source.check_box` and
        :func:`~cvdesign.io.source.check_finite`.

    Raises
    ------
    InputError
        A bad box, a non-finite coordinate (naming file, frame and atom), a
        file that ends before `stop`, or a read error (naming the file).
    """
    atoms = np.asarray(atom_indices, dtype=np.intp)
    read_atoms = None if every_atom(atoms, topology) else atoms  # whole frames: faster
    timed = stores_time(path)
    chunk_frames = max(1, int(chunk_frames))
    expected = int(start)
    try:
        with quiet_stdout():
            fh = md.open(str(path))
        try:
            layout = next((f for cls, f in _RAW if isinstance(fh, cls)), None)
            if layout is not None:
                chunks = _raw_chunks(fh, layout, int(start), int(stop), read_atoms,
                                     chunk_frames, timed)
            else:
                fh.close()
                fh = None
                chunks = _iterload_chunks(path, topology, int(start), int(stop), atoms,
                                          chunk_frames, timed)
            for chunk in chunks:
                expected = int(chunk.frames[-1]) + 1
                if select is not None:
                    keep = np.flatnonzero(select(chunk.frames))
                    if keep.size == 0:
                        continue
                    if keep.size < chunk.frames.size:
                        chunk = chunk.take(keep)
                check_box(chunk.trajectory, path, chunk.frames)
                check_finite(chunk.trajectory, path, chunk.frames, atoms, topology)
                yield chunk
        finally:
            if fh is not None:
                fh.close()
    except InputError:
        raise
    except Exception as exc:
        raise read_error(path, exc, expected, min(int(stop), expected + chunk_frames) - 1) from exc
    if expected < stop:
        raise InputError(f"trajectory {str(path)!r} ended at frame {expected} while frames up "
                         f"to {int(stop)} were expected (was the file changed or truncated "
                         "while being read?); check the file")
