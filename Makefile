# One-command entry points. `make test` and `make demo` run `setup` first when needed.
SHELL := /bin/bash
VENV := .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.setup-done
# ROS 2 Jazzy Python wheels from PyPI, used only when no sourced distro provides rclpy.
ROS_WHEELS := ros-jazzy-rclpy[fastrtps] ros-jazzy-std-msgs ros-jazzy-sensor-msgs \
  ros-jazzy-trajectory-msgs ros-jazzy-geometry-msgs ros-jazzy-diagnostic-msgs \
  ros-jazzy-std-srvs ros-jazzy-lifecycle-msgs
PYTEST_ARGS ?=

.PHONY: setup test demo bench soak clean

setup: $(STAMP)

$(STAMP): setup.py setup.cfg package.xml Makefile
	@set -e; \
	if python3 -c 'import rclpy' >/dev/null 2>&1; then \
	  echo "setup: rclpy comes from the sourced ROS 2 distro; the venv sees its packages"; \
	  python3 -m venv --system-site-packages $(VENV); \
	else \
	  echo "setup: no rclpy on this machine; installing the ROS 2 Jazzy wheels from PyPI"; \
	  python3 -m venv $(VENV); \
	  $(VENV)/bin/pip install -q $(ROS_WHEELS); \
	fi; \
	$(VENV)/bin/pip install -q -e '.[test]'; \
	touch $(STAMP)

test: setup
	$(PY) test/run_suite.py -q $(PYTEST_ARGS)

demo: setup
	$(VENV)/bin/adaptive-streamer demo

bench: setup
	$(PY) bench/run_all.py

soak: setup
	$(PY) bench/soak.py --duration 600

clean:
	rm -rf $(VENV) build install log .pytest_cache .hypothesis
