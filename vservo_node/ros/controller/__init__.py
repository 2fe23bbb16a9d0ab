"""The controller node, split along its lifecycle (``node.py`` has the transitions):

- ``parameters``  declaration from the schema, descriptors, the live-change check and apply
- ``model``       what configure builds: arm model, servo, perception and the taught view
- ``inputs``      subscriptions, JointHistory, FrameSlot, the perception thread, edge checks
- ``output_cycle`` the per-tick path on the output thread and the watchdogs
- ``outputs``     CommandOutput per command interface, status, features, diagnostics
- ``services``    the supervisor's services and their checks
- ``guards``      decorators that keep a bad callback from ending the node

``vservo_node.ros.controller_node`` documents the node's behaviour and holds the entry points.
"""

from vservo_node.interface import RUN_STATES

# States in which a run is servoing (braking is moving too, but no longer servoing).
ACTIVE_RUN = RUN_STATES
