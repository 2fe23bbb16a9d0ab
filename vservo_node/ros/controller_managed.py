"""``python -m vservo_node.ros.controller_managed``: the controller as a managed node that
starts unconfigured (``controller_node.main_managed``, console script ``vservo_managed``)."""
import sys

from vservo_node.ros.controller_node import main_managed

if __name__ == "__main__":
    sys.exit(main_managed())
