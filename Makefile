# pref_learner: two commands do all the set-up on a fresh machine.
#   make demo   -- the main job on the shipped arm and scenario
#   make test   -- the whole test suite
SHELL := /bin/bash
.SHELLFLAGS := -eo pipefail -c
.DEFAULT_GOAL := help

VENV ?= .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.installed

# DDS stays on this machine; a random domain keeps parallel runs apart.
export ROS_AUTOMATIC_DISCOVERY_RANGE := LOCALHOST
export ROS_DOMAIN_ID ?= $(shell python3 -c 'import random; print(random.randint(1, 101))')
export RMW_IMPLEMENTATION ?= rmw_fastrtps_cpp
export MPLBACKEND := Agg
export OPENBLAS_NUM_THREADS ?= 1

PIP_QUIET := 2>&1 | { grep -v -e 'is ignored: it is neither' -e '^WARNING: Location' || true; }

help:
	@echo 'make demo   run the teaching demo (creates .venv on first use)'
	@echo 'make test   run the test suite'
	@echo 'make bench  write benchmark figures to out/bench.json'

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

test: $(STAMP)
	$(PY) -m pytest -q test

bench: $(STAMP)
	$(VENV)/bin/pref-learner bench --json out/bench.json

validate: $(STAMP)
	$(VENV)/bin/pref-learner validate --out out/validate

clean:
	rm -rf out build install log

.PHONY: help venv demo test bench validate clean
