"""Child process of the SIGKILL test: records forever with the default split settings.

Writes /servo/status (std_msgs/String, JSON {"seq": i}) at 200 Hz and /joint_states at 100 Hz,
stamped with the wall clock, until killed. Prints the bag folder once the first message is
written. SYNTHETIC TEST DATA.
"""
import json
import sys
import time

import numpy as np
from rosbags.typesys import Stores, get_typestore

from vservo_node.record.bag import RunRecorder

ts = get_typestore(Stores.ROS2_JAZZY)
T = ts.types
rec = RunRecorder(sys.argv[1], "killed")
seq = 0
while True:
    now = time.time_ns()
    rec.write("servo/status", "std_msgs/msg/String",
              ts.serialize_cdr(T["std_msgs/msg/String"](data=json.dumps({"seq": seq})),
                               "std_msgs/msg/String"), now)
    if seq % 2 == 0:
        header = T["std_msgs/msg/Header"](
            stamp=T["builtin_interfaces/msg/Time"](sec=now // 10**9, nanosec=now % 10**9),
            frame_id="")
        rec.write("joint_states", "sensor_msgs/msg/JointState",
                  T["sensor_msgs/msg/JointState"](header=header, name=["a"],
                                                  position=np.array([seq * 1e-3]),
                                                  velocity=np.zeros(1), effort=np.zeros(0)), now)
    if seq == 0:
        print(rec.bag_dir, flush=True)
    seq += 1
    time.sleep(0.005)
