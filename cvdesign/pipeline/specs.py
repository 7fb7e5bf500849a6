"""Spec documents of ranked CVs, and the provenance they carry.

Each ranked combination becomes a spec (:class:`cvdesign.spec.Spec`), built as a
document and validated by loading it (schema and semantic checks) before it is
written; inputs are recorded by name and checksum, frame ranges or label checksums.
"""

import concurrent.futures
import copy
import hashlib
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .._version import __version__
from ..constants import COORDINATION_EXPONENTS, UNITS
from ..io.source import file_sha256
from ..kinds import GROUP_KINDS
from ..spec import Spec, atom_identity, cv_digest, residue_hashes, topology_fingerprint
from .output import CAUTION
from .ranking import _both

__all__ = ["describe_inputs", "InputChecksums", "SourceRecord", "spec_document"]


def describe_inputs(source, seg_counts, timesteps):
    out = {}
    for si, seg in enumerate(source.segments):
        key = str(seg.path)
        row = out.setdefault(key, {"path": key, "file": seg.path.name, "states": [],
                                   "frames": 0, "frame_step_ps": timesteps.get(si)})
        for s in np.flatnonzero(seg_counts[si]):
            if source.states[s] not in row["states"]:
                row["states"].append(source.states[s])
        row["frames"] += int(seg_counts[si].sum())
        if row["frame_step_ps"] is None:
            row["frame_step_ps"] = timesteps.get(si)
    return list(out.values())


def _topology_provenance(source):
    if source.topology_path is None:
        return {"file": None, "sha256": None}
    return {"file": Path(source.topology_path).name, "sha256": file_sha256(source.topology_path)}


def _segments_provenance(source):
    """Which frames of which file were given to which state (and the bias-energy file of a
    biased run); also the provenance of the funnel spec of biased runs."""
    out = []
    for seg in source.segments:
        row = {"file": seg.path.name}
        if seg.labels is None:
            row.update({"state": seg.state, "start": seg.start, "stop": seg.stop})
        else:
            labels = [x for x in seg.labels]
            counts = {}
            for x in labels:
                if x is not None:
                    counts[x] = counts.get(x, 0) + 1
            row.update({"labels": {"n_frames": len(labels), "frames_per_state": counts,
                                   "sha256": _labels_sha256(labels)}})
        if seg.bias is not None:  # a biased run: its frames were reweighted
            row["bias"] = {"file": seg.bias_path.name, "sha256": file_sha256(seg.bias_path),
                           "column": seg.bias_column, "temperature_k": source.temperature}
        out.append(row)
    return out


def _labels_sha256(labels):
    text = "\n".join("" if x is None else str(x) for x in labels)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


@dataclass(frozen=True)
class SourceRecord:
    """What every spec of one run records about its inputs, computed once per run.

    The topology's identity (fingerprint and residue hashes, a pass over every atom)
    and the provenance of the topology and bias-energy files (their SHA-256) are the
    same for every ranked CV: hashed once, not once per spec.

    Attributes
    ----------
    topology : dict
        ``n_atoms``, ``fingerprint``, ``residues`` (the spec's ``topology``).
    topology_file : dict
        ``file`` and ``sha256`` of the topology file (None without a file).
    segments : list of dict
        Which frames of which file went to which state; bias files with checksums.

    Examples
    --------
    >>> from cvdesign.io.demo import demo_inputs
    >>> from cvdesign.io.source import Source
    >>> top, files = demo_inputs()
    >>> record = SourceRecord.of(Source(top).add(files["closed"][0], "closed"))
    >>> record.topology["n_atoms"], record.segments[0]["state"]
    (12, 'closed')
    """

    topology: dict
    topology_file: dict
    segments: list

    @classmethod
    def of(cls, source):
        """The record of `source` (reads and hashes its topology and bias files)."""
        top = source.topology
        return cls({"n_atoms": top.n_atoms, "fingerprint": topology_fingerprint(top),
                    "residues": residue_hashes(top)},
                   _topology_provenance(source), _segments_provenance(source))


def spec_document(source, pool, entry, params, checksums, seed, record=None):
    """The spec of a ranked CV as a plain dict, validated through :class:`Spec`.

    `record` (a :class:`SourceRecord` of `source`) is made here when not given; a run
    with several specs makes it once.
    """
    top = source.topology
    record = SourceRecord.of(source) if record is None else record
    by_id = {d.id: d for d in pool.descriptors}
    seen, descriptors = set(), []
    for t in entry["terms"]:
        if t["descriptor"] in seen:
            continue
        seen.add(t["descriptor"])
        d = by_id[t["descriptor"]]
        doc = {"id": d.id, "kind": d.kind, "label": d.label, "periodic": d.periodic}
        if d.kind in GROUP_KINDS:
            doc["groups"] = [list(g) for g in d.groups]
            doc["atom_identities"] = [[atom_identity(top, a) for a in g] for g in d.groups]
            if d.kind == "center_distance":
                doc["weighting"] = pool.weighting(d)
                if doc["weighting"] == "mass":
                    doc["masses"] = [pool.group_masses(g) for g in d.groups]
            else:
                n, m = COORDINATION_EXPONENTS
                doc.update(r0=d.r0, n=n, m=m)
        else:
            doc["atoms"] = list(d.atoms)
            doc["atom_identities"] = [atom_identity(top, a) for a in d.atoms]
        descriptors.append(doc)
    terms = [{"descriptor": t["descriptor"], "transform": t["transform"], "center": t["center"],
              "scale": t["scale"], "weight": t["weight"]} for t in entry["terms"]]
    scores = {"rank": entry["rank"]}
    for key in ("heldout_score", "heldout_score_se", "heldout_fisher_ratio",
                "heldout_fisher_ratio_se", "heldout_overlap", "fisher_ratio_all",
                "heldout_autocorrelation", "autocorrelation_all", "timescale_ps", "lag_ps",
                "integrated_time_ps", "frame_spacing_ps"):
        if entry.get(key) is not None:
            scores[key] = entry[key]
    # the slowness within the states and along crossing runs beside the measure about one
    # common mean (which pairs that never leave their state make slow for every separating
    # CV), with whether each timescale is resolved (1/0), as ranking.csv has them
    for key in ("heldout_autocorrelation_within_states", "timescale_within_states_ps",
                "heldout_autocorrelation_transitions", "timescale_transitions_ps"):
        if entry.get(key) is not None:
            scores[key] = entry[key]
    for key in ("timescale_resolved", "timescale_within_states_resolved",
                "timescale_transitions_resolved"):
        if entry.get(key) is not None:
            scores[key] = int(bool(entry[key]))
    interval = _both(entry.get("integrated_time_ci_ps"))
    if interval is not None:  # the time's 95 % interval, ps
        scores["integrated_time_ci_ps"] = [float(interval[0]), float(interval[1])]
    if entry.get("integrated_time_decayed") is not None:  # a flag, 1 or 0 (scores are numbers)
        scores["integrated_time_decayed"] = int(bool(entry["integrated_time_decayed"]))
    doc = {
        "format": "cvdesign-spec", "version": 1, "name": entry["spec"][:-5],
        "units": dict(UNITS),
        "topology": copy.deepcopy(record.topology),
        "descriptors": descriptors, "terms": terms, "offset": 0.0, "periodic": False,
        "states": entry["states"], "scores": scores,
        "reachable_range": entry["reachable_range"], "observed_range": entry["observed_range"],
        **({"hints": entry["hints"]} if entry.get("hints") else
           {"hints": {"hints_refused": entry["hints_refused"]}} if entry.get("hints_refused")
           else {}),
        "provenance": {"cvdesign_version": __version__,
                       "method": f"{entry['method']} ({entry['objective']})",
                       "inputs": [{"file": c["file"], "sha256": c["sha256"],
                                   "state": ",".join(c["states"]) or None} for c in checksums],
                       "seed": seed, "parameters": params,
                       "topology": copy.deepcopy(record.topology_file),
                       "segments": copy.deepcopy(record.segments)},
        "caution": " ".join([CAUTION] + [f"Warning: {w}." for w in entry.get("warnings", [])]),
    }
    doc["cv_digest"] = cv_digest(doc)  # the CV its states and observed range are for
    return Spec.from_dict(doc).to_dict()


class InputChecksums:
    """Name, SHA-256 and states of every trajectory file a source reads, started early.

    With an executor in this machine (None, serial, or local processes) the files
    are hashed in a background thread from the moment this object is made: hashing
    and reading release the GIL, so the hashing fills the time in which worker
    processes start up and this process only waits (measured: 0.4 s of a 10 s
    ``suggest`` at 10^5 frames per state with 2 workers), and the second core of a
    serial run. On a Dask cluster the files are hashed one task per file on the
    workers, when :meth:`result` is called.

    Parameters
    ----------
    source : cvdesign.io.source.Source
    executor : Executor, default=None
        A :mod:`cvdesign.parallel` executor (None: this process).

    Examples
    --------
    >>> from cvdesign.io.demo import demo_inputs
    >>> from cvdesign.io.source import Source
    >>> top, files = demo_inputs()
    >>> src = Source(top).add(files["closed"][0], "closed")
    >>> sums = InputChecksums(src)  # the hashing starts now, in a thread
    >>> (row,) = sums.result([{"path": p, "states": ["closed"]} for p in sums.paths])
    >>> row["file"], len(row["sha256"]), row["states"]
    ('closed-1.xtc', 64, ['closed'])
    """

    def __init__(self, source, executor=None):
        from ..parallel.executors import ProcessExecutor

        self.paths = [str(p) for p in source.files()]
        self.executor = executor
        self._futures = None
        if executor is None or getattr(executor, "in_process", False) or \
                isinstance(executor, ProcessExecutor):
            pool = concurrent.futures.ThreadPoolExecutor(1, thread_name_prefix="cvdesign-sha256")
            self._futures = [pool.submit(file_sha256, p) for p in self.paths]
            pool.shutdown(wait=False)

    def result(self, inputs):
        """``[{"file": name, "sha256": hex digest, "states": ...}, ...]``, one per file.

        Parameters
        ----------
        inputs : list of dict
            :func:`describe_inputs`'s entries (their ``path`` and ``states``).
        """
        if self._futures is not None:
            digests = [f.result() for f in self._futures]
        else:
            digests = [None] * len(self.paths)
            for i, digest in self.executor.run(_sha256_task, None, self.paths):
                digests[i] = digest
        return [{"file": Path(p).name, "sha256": d,
                 "states": next(i["states"] for i in inputs if i["path"] == p)}
                for p, d in zip(self.paths, digests)]

    def cancel(self):
        """Stop hashing the files not yet begun (the run ended early)."""
        for f in self._futures or ():
            f.cancel()


def _sha256_task(context, path):
    """One file's SHA-256, as an executor's task (module level: workers load it)."""
    return file_sha256(path)
