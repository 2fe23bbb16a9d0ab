"""Run records: one servo run as a rosbag2 bag (MCAP storage), written crash-safe; and read back.

Writing (`RunRecorder`): messages arrive as CDR bytes (what rclpy's `serialize_message` returns)
or rosbags message objects, with their ROS 2 type name, topic and a timestamp in nanoseconds.
The bag is a folder ``<root>/<UTC time>_<scenario>/`` holding

- ``<folder>_<i>.mcap``: short MCAP files (splits), each closed with its summary section by the
  rosbags writer;
- ``metadata.yaml``: rosbag2 metadata (format version 9, as rosbags writes it), written when the
  bag opens and rewritten after every completed split, so it always lists only complete files;
- ``params.yaml``: the parameters of the run, ``result.json``: the run result once known;
- ``reference/``: a copy of the taught reference file and the files it names (`copy_reference`).

Crash safety: the split being written lives in a hidden folder ``.open/`` and is moved into the
bag only once closed. A SIGKILL therefore loses at most the open split: a split is closed when it
is ``split_s`` seconds old (wall clock, checked by a background thread every ``poll_s``) or
``split_bytes`` large, so by default at most 0.75 s + 0.05 s of data is lost (plus scheduling
delays of the recording thread).

Reading (`load_run`): any rosbag2 bag of the same topics, whether ours or from a plain
``ros2 bag record`` (sqlite3 or mcap), through rosbags' AnyReader; topics are found by their
name suffix (namespaces allowed) and type. Times are seconds since the first message of the bag
(bag log time), so all series share one clock.
"""
from __future__ import annotations

# Split into the shared names (bag_format), the writer and the reader; every name keeps this
# import path.
from vservo_node.record.bag_format import (COMPRESSED_IMAGE, DEFAULT_POLL_S, DEFAULT_SPLIT_BYTES,
                                           DEFAULT_SPLIT_S, IMAGE, METADATA_FILE, OPEN_DIR,
                                           PARAMS_FILE, PARAMS_MAX_BYTES, REFERENCE_DIR,
                                           RESULT_FILE, ROS_DISTRO, ROSBAG2_VERSION,
                                           default_typestore, image_to_array, image_to_rgb,
                                           run_folder_name)
from vservo_node.record.bag_reader import (Frame, Piece, RunData, Series, load_run, match_topic,
                                           _read_params, _status_table)
from vservo_node.record.bag_writer import (RunRecorder)

__all__ = ["COMPRESSED_IMAGE", "DEFAULT_POLL_S", "DEFAULT_SPLIT_BYTES", "DEFAULT_SPLIT_S", "IMAGE",
           "METADATA_FILE", "OPEN_DIR", "PARAMS_FILE", "PARAMS_MAX_BYTES", "REFERENCE_DIR",
           "RESULT_FILE", "ROS_DISTRO", "ROSBAG2_VERSION", "default_typestore",
           "image_to_array", "image_to_rgb", "run_folder_name", "Frame", "Piece", "RunData",
           "Series", "load_run", "match_topic", "_read_params", "_status_table", "RunRecorder"]
