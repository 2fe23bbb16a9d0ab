# Two commands for a fresh clone: `make demo` and `make test`. Each sets up .venv itself.
PYTHON ?= python3
VENV   := .venv
PY     := $(VENV)/bin/python
STAMP  := $(VENV)/.installed
ISOLATED := tools/isolated

.PHONY: venv demo test test-core bench soak clean

venv: $(STAMP)

$(STAMP): requirements.txt constraints.txt setup.py
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade "pip>=24"
	$(PY) -m pip install --quiet -r requirements.txt -c constraints.txt
	$(PY) -m pip install --quiet --no-deps -e .
	touch $(STAMP)

# The main job on the built-in simulated cell (sim node + controller over DDS, isolated).
demo: venv
	$(ISOLATED) $(PY) -m vservo_node.cli demo $(DEMO_ARGS)

# The whole suite; ROS tests run inside a private network namespace (see DEVELOPERS.md).
test: venv
	$(ISOLATED) $(PY) -m pytest tests $(PYTEST_ARGS)

# The suite without ROS processes (fast inner loop).
test-core: venv
	$(PY) -m pytest tests --ignore=tests/ros --ignore=tests/e2e $(PYTEST_ARGS)

# Ten minutes of repeated runs on the simulated cell: memory, timing, records (tools/soak.py).
soak: venv
	$(ISOLATED) $(PY) tools/soak.py --minutes $(or $(SOAK_MINUTES),10)

bench: venv
	@for b in benchmarks/*.py; do echo "== $$b"; $(ISOLATED) $(PY) $$b || exit 1; done

clean:
	rm -rf $(VENV) build *.egg-info .pytest_cache
