"""Input and output: trajectories by state (:mod:`.source`), bias energies of biased runs,
their frame weights and rescaled time (:mod:`.bias`), atomic writes and output checks
(:mod:`.atomic`), the bundled demo data (:mod:`.demo`)."""

from .atomic import (atomic_open, atomic_path, atomic_paths, atomic_write_text,
                     check_output_file, prepare_output_dir, write_dir_atomically)
from .bias import Reweighting, kish_ess, read_bias_file, reweight
from .demo import demo_data_dir
from .source import (Chunk, Segment, Source, check_box, check_finite, check_label_count,
                     describe_selection, every_atom, file_frames, file_sha256, load_topology,
                     quiet_stdout, read_labels_file, select_atoms, stores_time)

__all__ = ["Source", "Segment", "Chunk", "load_topology", "select_atoms", "describe_selection",
           "file_frames", "file_sha256",
           "stores_time", "quiet_stdout", "check_box", "check_finite", "check_label_count",
           "every_atom", "atomic_write_text", "atomic_open", "atomic_path", "atomic_paths",
           "check_output_file", "prepare_output_dir", "write_dir_atomically", "demo_data_dir",
           "read_bias_file", "kish_ess", "Reweighting", "reweight", "read_labels_file"]
