"""Named QoS profiles, one per kind of traffic, so every node and test pairs them the same way.

Compatibility (ROS 2 docs, "Quality of Service settings", QoS compatibilities table): a
best-effort subscription matches a reliable or best-effort publisher; a reliable subscription
matches only a reliable publisher; a transient-local subscription matches only a
transient-local publisher. Hence publishers of state use RELIABLE (any subscriber can match)
and subscribers of sensor streams use BEST_EFFORT (they match any camera driver).
"""
from rclpy.qos import DurabilityPolicy, HistoryPolicy, QoSProfile, ReliabilityPolicy

# Camera images and camera info: newest frame wins; a late frame is worth less than a dropped
# one. Depth 2 lets a frame arrive while the previous one is being processed (common practice,
# no source).
SENSOR_DATA = QoSProfile(history=HistoryPolicy.KEEP_LAST, depth=2,
                         reliability=ReliabilityPolicy.BEST_EFFORT,
                         durability=DurabilityPolicy.VOLATILE)

# Joint states and status/feedback topics: reliable so that any subscriber (reliable or
# best-effort) matches; depth 10 absorbs scheduling hiccups at 250 Hz (common practice, no
# source).
STATE = QoSProfile(history=HistoryPolicy.KEEP_LAST, depth=10,
                   reliability=ReliabilityPolicy.RELIABLE,
                   durability=DurabilityPolicy.VOLATILE)

# Inputs from the cell the controller subscribes to (joint states, speed scale, permit):
# best-effort subscriptions, so a best-effort publisher (some drivers publish joint states so)
# matches as well as a reliable one; depth 10 as STATE.
STATE_IN = QoSProfile(history=HistoryPolicy.KEEP_LAST, depth=10,
                      reliability=ReliabilityPolicy.BEST_EFFORT,
                      durability=DurabilityPolicy.VOLATILE)

# Motion commands: reliable; only the newest command matters, an older one still queued would
# move the arm on stale data.
COMMANDS = QoSProfile(history=HistoryPolicy.KEEP_LAST, depth=1,
                      reliability=ReliabilityPolicy.RELIABLE,
                      durability=DurabilityPolicy.VOLATILE)

# Published once, read by late joiners: robot_description, taught poses, run results.
LATCHED = QoSProfile(history=HistoryPolicy.KEEP_LAST, depth=1,
                     reliability=ReliabilityPolicy.RELIABLE,
                     durability=DurabilityPolicy.TRANSIENT_LOCAL)

# /clock publisher: reliable keep-last 1 matches rclpy's own best-effort depth-1 time source
# subscription (rclpy/time_source.py) and any reliable subscriber.
CLOCK = QoSProfile(history=HistoryPolicy.KEEP_LAST, depth=1,
                   reliability=ReliabilityPolicy.RELIABLE,
                   durability=DurabilityPolicy.VOLATILE)

PROFILES = {"sensor_data": SENSOR_DATA, "state": STATE, "state_in": STATE_IN,
            "commands": COMMANDS,
            "latched": LATCHED, "clock": CLOCK}


def profile(name: str) -> QoSProfile:
    """The profile called ``name`` (a key of PROFILES); ValueError naming the choices."""
    try:
        return PROFILES[name]
    except KeyError:
        raise ValueError(f"unknown QoS profile {name!r}; expected one of "
                         f"{sorted(PROFILES)}") from None
