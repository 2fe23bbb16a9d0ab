"""ament_python package: `colcon build` on a ROS 2 install, or `pip install -e .` in a venv."""
import os
from glob import glob

from setuptools import find_packages, setup

PACKAGE = "vservo_node"


def data_tree(folder):
    """(install dir, files) pairs for every file below folder, keeping sub-folders."""
    pairs = []
    for root, _dirs, files in os.walk(folder):
        if files:
            pairs.append((os.path.join("share", PACKAGE, root),
                          [os.path.join(root, f) for f in files]))
    return pairs


setup(
    name=PACKAGE,
    version="0.1.0",
    packages=find_packages(exclude=["tests", "tests.*"]),
    data_files=[
        ("share/ament_index/resource_index/packages", ["resource/" + PACKAGE]),
        ("share/" + PACKAGE, ["package.xml"]),
        ("share/" + PACKAGE + "/launch", glob("launch/*.py")),
    ] + data_tree("config"),
    # Python dependencies: see requirements.txt (pinned) for venv installs; on a ROS 2 install
    # they come from rosdep keys in package.xml.
    install_requires=["setuptools"],
    # What colcon looks for to run `colcon test` with pytest (without it colcon falls back to
    # unittest and finds no test), as ROS 2's ament_python package template declares it
    # (tests_require is gone from setuptools >= 72).
    extras_require={"test": ["pytest"]},
    zip_safe=True,
    maintainer="vservo_node maintainers",
    maintainer_email="vservo-maintainers@example.com",
    description="Image-based visual servoing for eye-in-hand arms, with a simulated cell.",
    license="Apache-2.0",
    entry_points={
        "console_scripts": [
            "vservo = vservo_node.cli:main",
            "vservo_node = vservo_node.ros.controller_node:main",
            "vservo_managed = vservo_node.ros.controller_node:main_managed",
            "vservo_sim = vservo_node.ros.sim_node:main",
            "vservo_recorder = vservo_node.ros.recorder_node:main",
        ],
    },
)
