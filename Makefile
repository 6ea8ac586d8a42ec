# Two commands do all set-up on a fresh machine with Python 3.11: `make demo` and `make test`.
# Every process these targets start that opens a ROS context keeps DDS discovery on this machine
# (ROS_AUTOMATIC_DISCOVERY_RANGE=LOCALHOST) and uses a domain id of its own for this run.

PYTHON ?= python3.11
VENV ?= .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

export ROS_AUTOMATIC_DISCOVERY_RANGE := LOCALHOST
# Drawn once per make run (a plain `?=` would draw again at every expansion, so the id echoed
# would not be the id the processes use).
ifndef ROS_DOMAIN_ID
ROS_DOMAIN_ID := $(shell $(PYTHON) -c 'import random; print(random.randint(1, 101))' 2>/dev/null || echo 57)
endif
export ROS_DOMAIN_ID
# One BLAS thread: the solver's small factorisations gain nothing from threads on 2 cores and
# OpenBLAS's spinning helpers steal the core the other node needs.
export OPENBLAS_NUM_THREADS := 1
export OMP_NUM_THREADS := 1

.PHONY: all install demo test bench clean

all: test

$(STAMP): requirements.txt setup.py package.xml
	@command -v $(PYTHON) >/dev/null || { echo "need $(PYTHON) on PATH (or make PYTHON=/path/to/python3.11)"; exit 1; }
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -r requirements.txt
	$(BIN)/python -m pip install --quiet --no-deps -e .
	@touch $(STAMP)

install: $(STAMP)

demo: $(STAMP)
	@echo "ROS_DOMAIN_ID=$(ROS_DOMAIN_ID) ROS_AUTOMATIC_DISCOVERY_RANGE=$(ROS_AUTOMATIC_DISCOVERY_RANGE)"
	$(BIN)/riskbound closedloop --out out/demo

test: $(STAMP)
	@echo "ROS_DOMAIN_ID=$(ROS_DOMAIN_ID) ROS_AUTOMATIC_DISCOVERY_RANGE=$(ROS_AUTOMATIC_DISCOVERY_RANGE)"
	$(BIN)/python -m pytest -q test

bench: $(STAMP)
	$(BIN)/riskbound bench planner --out out/bench
	$(BIN)/riskbound bench tracker --out out/bench
	$(BIN)/riskbound bench compare --out out/bench

clean:
	rm -rf $(VENV) out build *.egg-info src/*.egg-info
