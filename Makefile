# epicorr developer commands.  `make demo` and `make test` work on a fresh clone.
SHELL := /bin/bash
PYTHON ?= python3
VENV := .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.installed-stamp
DEMO_OUT ?= demo-output
# Extra pytest arguments, e.g. `make test PYTEST_ARGS="-k unwarp"`.
PYTEST_ARGS ?=

.PHONY: install install-tools install-browser install-validator install-slurm demo test bench clean

install: $(STAMP)

$(STAMP): pyproject.toml
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e '.[test]'
	touch $(STAMP)

# System tools some tests need (CI installs them all; locally the tests that
# need a missing tool skip and say why).
install-tools: install-browser install-validator install-slurm

install-browser:
	@command -v chromium >/dev/null 2>&1 || bash tools/apt-install.sh chromium

install-validator:
	@test -x .tools/node/node_modules/.bin/bids-validator || \
	  npm install --silent --no-audit --no-fund --prefix .tools/node bids-validator@1.15.0

install-slurm:
	@command -v slurmctld >/dev/null 2>&1 || bash tools/apt-install.sh slurm-wlm munge

demo: install
	$(VENV)/bin/epicorr demo $(DEMO_OUT)

test: install
	$(PY) -m pytest -n 2 --dist loadfile $(PYTEST_ARGS)

bench: install
	$(PY) benchmarks/run.py

clean:
	rm -rf $(VENV) .tools $(DEMO_OUT) .pytest_cache build *.egg-info
