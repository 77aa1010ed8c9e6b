# pref_learner: two commands do all the set-up on a fresh machine.
#   make demo   -- the main job on the shipped arm and scenario
#   make test   -- the whole test suite, with line coverage over every process it starts
SHELL := /bin/bash
.SHELLFLAGS := -eo pipefail -c
.DEFAULT_GOAL := help

VENV ?= .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.installed

# DDS stays on this machine whatever the environment says (an exported SUBNET range,
# static peers or a middleware profile that could name other hosts are overridden; a
# sourced Humble, which has no range, gets ROS_LOCALHOST_ONLY=1); a random domain keeps
# parallel runs apart.
export ROS_AUTOMATIC_DISCOVERY_RANGE := LOCALHOST
unexport ROS_STATIC_PEERS FASTRTPS_DEFAULT_PROFILES_FILE FASTDDS_DEFAULT_PROFILES_FILE
unexport CYCLONEDDS_URI ROS_DISCOVERY_SERVER
ifneq ($(filter foxy galactic humble,$(ROS_DISTRO)),)
export ROS_LOCALHOST_ONLY := 1
endif
export ROS_DOMAIN_ID ?= $(shell python3 -c 'import random; print(random.randint(1, 101))')
export RMW_IMPLEMENTATION ?= rmw_fastrtps_cpp
export MPLBACKEND := Agg
export OPENBLAS_NUM_THREADS ?= 1

PIP_QUIET := 2>&1 | { grep -v -e 'is ignored: it is neither' -e '^WARNING: Location' || true; }

help:
	@echo 'make demo      run the teaching demo (creates .venv on first use)'
	@echo 'make test      run the test suite under coverage; prints the coverage report and total'
	@echo 'make bench     write benchmark figures to out/bench.json (several minutes)'
	@echo 'make validate  run the validation studies into out/validate (about 10 minutes)'
	@echo 'make venv      create .venv only'
	@echo 'make help      this list'
	@echo 'make clean     remove out/, build/, install/, log/ and coverage data'

$(STAMP): requirements.txt requirements-ros.txt setup.py
	@echo '[setup] creating $(VENV) (first run only, ~1 min)'
	@if [ -n "$$ROS_DISTRO" ]; then \
	    python3 -m venv --system-site-packages $(VENV); \
	else \
	    python3 -m venv $(VENV); \
	fi
	@$(PY) -m pip install -q --disable-pip-version-check -r requirements.txt $(PIP_QUIET)
	@if [ -z "$$ROS_DISTRO" ]; then \
	    $(PY) -m pip install -q --disable-pip-version-check -r requirements-ros.txt $(PIP_QUIET); \
	fi
	@$(PY) -m pip install -q --disable-pip-version-check --no-deps -e . $(PIP_QUIET)
	@touch $@

venv: $(STAMP)

demo: $(STAMP)
	$(VENV)/bin/pref-learner demo --out out/demo

# Coverage counts the node and CLI subprocesses too (.coveragerc: patch = subprocess);
# the percentage is reported, never a reason to fail. test/test_workspace.py builds the
# package with colcon (requirements.txt) in a temporary workspace and runs what it installed.
test: $(STAMP)
	@rm -f .coverage .coverage.*
	@rc=0; $(PY) -m coverage run -m pytest -q test || rc=$$?; \
	$(PY) -m coverage combine -q; \
	$(PY) -m coverage report; \
	echo "line coverage, all processes: $$($(PY) -m coverage report --format=total)%"; \
	exit $$rc

bench: $(STAMP)
	$(VENV)/bin/pref-learner bench --json out/bench.json

validate: $(STAMP)
	$(VENV)/bin/pref-learner validate --out out/validate

clean:
	rm -rf out build install log .coverage .coverage.*

.PHONY: help venv demo test bench validate clean
