# Two commands for a fresh clone: `make demo` and `make test`. Each sets up .venv itself.
PYTHON ?= python3
VENV   := .venv
PY     := $(VENV)/bin/python
STAMP  := $(VENV)/.installed
ISOLATED := tools/isolated

# ROS 2 tool checks (tests/install): colcon, rosdep, xmllint and ros2 launch on a second venv
# with ROS 2's launch/ros2cli wheels from ../shared/ros2-tools (beside the repository, as CI lays
# it out; ROS2_TOOLS=... to point elsewhere). Where the folder is absent they skip, saying so.
ROS2_TOOLS ?= $(abspath ../shared/ros2-tools)
export VSERVO_ROS2_TOOLS := $(ROS2_TOOLS)
VENV_ROS2  := .venv-ros2
ROS2_STAMP := $(VENV_ROS2)/.installed
VENV_JAZZY := .venv-ros2-jazzy
JAZZY_STAMP := $(VENV_JAZZY)/.installed

.PHONY: venv venv-ros2 venv-ros2-jazzy demo lint test test-core test-install bench bench-scripts soak clean

venv: $(STAMP)

$(STAMP): requirements.txt constraints.txt setup.py
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade "pip>=24"
	$(PY) -m pip install --quiet -r requirements.txt -c constraints.txt
	$(PY) -m pip install --quiet --no-deps -e .
	touch $(STAMP)

venv-ros2: venv
	@if [ -d "$(ROS2_TOOLS)/wheels/kilted" ]; then $(MAKE) --no-print-directory $(ROS2_STAMP); \
	else echo "venv-ros2: $(ROS2_TOOLS) not found: the ROS 2 tool checks (tests/install) skip"; fi

# The project's packages come from .venv as hard links (the same pinned files, in seconds instead
# of a second install; a plain copy where links are impossible), without .venv's editable
# vservo_node: inside .venv-ros2 the package must come from a colcon install. Then the tools.
$(ROS2_STAMP): $(STAMP) requirements-ros2-tools.txt $(wildcard $(ROS2_TOOLS)/wheels/kilted/*.whl)
	rm -rf $(VENV_ROS2)
	$(PYTHON) -m venv --without-pip $(VENV_ROS2)
	$(VENV_ROS2)/bin/python tools/link_venv.py $(VENV) $(VENV_ROS2) --drop vservo_node
	$(VENV_ROS2)/bin/python -m pip install --quiet -r requirements-ros2-tools.txt -c constraints.txt
	$(VENV_ROS2)/bin/python -m pip install --quiet --no-deps $(ROS2_TOOLS)/wheels/kilted/*.whl
	touch $@

# The same on ROS 2 Jazzy's Python stack (requirements-ros2-jazzy.txt): every ROS wheel of .venv
# left out, Jazzy's from PyPI, the other packages kept at constraints.txt's pins.
venv-ros2-jazzy: venv
	@if [ -d "$(ROS2_TOOLS)/wheels/jazzy" ]; then $(MAKE) --no-print-directory $(JAZZY_STAMP); \
	else echo "venv-ros2-jazzy: $(ROS2_TOOLS) not found: the Jazzy checks (tests/install) skip"; fi

$(JAZZY_STAMP): $(STAMP) requirements-ros2-tools.txt requirements-ros2-jazzy.txt $(wildcard $(ROS2_TOOLS)/wheels/jazzy/*.whl)
	rm -rf $(VENV_JAZZY)
	$(PYTHON) -m venv --without-pip $(VENV_JAZZY)
	$(VENV_JAZZY)/bin/python tools/link_venv.py $(VENV) $(VENV_JAZZY) --drop vservo_node --drop-prefix ros_
	grep -v '^ros-' constraints.txt > $(VENV_JAZZY)/constraints-not-ros.txt
	$(VENV_JAZZY)/bin/python -m pip install --quiet -r requirements-ros2-jazzy.txt -c $(VENV_JAZZY)/constraints-not-ros.txt
	$(VENV_JAZZY)/bin/python -m pip install --quiet --no-deps $(ROS2_TOOLS)/wheels/jazzy/*.whl
	touch $@

# The main job on the built-in simulated cell (sim node + controller over DDS, isolated).
demo: venv
	$(ISOLATED) $(PY) -m vservo_node.cli demo $(DEMO_ARGS)

# Lint and type checks (ruff.toml; setup.cfg [mypy]: strict on control/, vision/, servo*.py).
lint: venv
	$(PY) -m ruff check .
	$(PY) -m mypy

# The whole suite, after the lint and type checks; ROS tests run inside a private network
# namespace (see DEVELOPERS.md).
test: venv venv-ros2 venv-ros2-jazzy lint
	$(ISOLATED) $(PY) -m pytest tests $(PYTEST_ARGS)

# The suite without ROS processes (fast inner loop).
test-core: venv
	$(PY) -m pytest tests --ignore=tests/ros --ignore=tests/e2e --ignore=tests/install $(PYTEST_ARGS)

# Only the ROS 2 tool checks (colcon, rosdep, xmllint, ros2 launch).
test-install: venv venv-ros2 venv-ros2-jazzy
	$(ISOLATED) $(PY) -m pytest tests/install $(PYTEST_ARGS)

# Ten minutes of repeated runs on the simulated cell: memory, timing, records (tools/soak.py).
soak: venv
	$(ISOLATED) $(PY) tools/soak.py --minutes $(or $(SOAK_MINUTES),10)

# The performance table (a few minutes; DDS rows through tools/isolated): bench.json beside it.
bench: venv
	$(PY) -m vservo_node.cli bench --json bench.json

# The older single-purpose benchmark scripts, one after the other.
bench-scripts: venv
	@for b in benchmarks/*.py; do echo "== $$b"; $(ISOLATED) $(PY) $$b || exit 1; done

clean:
	rm -rf $(VENV) $(VENV_ROS2) $(VENV_JAZZY) build *.egg-info .pytest_cache .mypy_cache .ruff_cache
