# labeler: two commands from a fresh checkout.
#   make test   builds or reuses .venv/, installs everything, runs the whole test suite
#               (the store, workflow and CLI tests on SQLite and on a throwaway PostgreSQL
#               server the test session starts and stops; Debian package postgresql)
#   make demo   builds or reuses .venv/, installs everything, builds and shows a demo project
# and for contributors:
#   make lint   ruff, then the room rules as import contracts (lint-imports, pyproject.toml)
SHELL := /bin/bash
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed
APT_PACKAGES := xvfb xdotool x11-apps imagemagick postgresql
SUDO := $(shell [ "$$(id -u)" = 0 ] || echo sudo)
# torch/torchvision releases that lie on this machine's disk (a range resolves to them)
TORCH_PINS := torch==2.14.1 torchvision==0.29.1

.PHONY: test demo install system-packages lint bench clean-venv

install: $(STAMP)

system-packages:
	@missing=""; \
	command -v Xvfb >/dev/null || missing="$$missing xvfb"; \
	command -v xdotool >/dev/null || missing="$$missing xdotool"; \
	command -v xwd >/dev/null || missing="$$missing x11-apps"; \
	command -v convert >/dev/null || missing="$$missing imagemagick"; \
	{ command -v initdb >/dev/null || ls /usr/lib/postgresql/*/bin/initdb >/dev/null 2>&1; } \
	  || missing="$$missing postgresql"; \
	if [ -n "$$missing" ]; then \
	  echo "installing system packages:$$missing"; \
	  $(SUDO) apt-get update -qq && \
	  DEBIAN_FRONTEND=noninteractive $(SUDO) apt-get install -y -qq --no-install-recommends $$missing; \
	fi

$(STAMP): pyproject.toml
	@$(MAKE) --no-print-directory system-packages
	@test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install -q --upgrade pip
	$(BIN)/python -m pip install -q $(TORCH_PINS)
	$(BIN)/python -m pip install -q -e '.[dev]'
	@touch $(STAMP)

test: $(STAMP)
	@$(MAKE) --no-print-directory system-packages
	$(BIN)/python -m pytest

demo: $(STAMP)
	$(BIN)/labeler demo

lint: $(STAMP)
	$(BIN)/ruff check .
	$(BIN)/lint-imports

# every benchmark script (benchmarks/datasets.py is their shared helper, not a benchmark),
# then the label-efficiency benchmark, a package run with -m (about 40 minutes), and the
# benchmarks that use that package's loaders, run with -m too
BENCH_MODULES := adaptation_gain annotation_effort ontile_rule
BENCH_SCRIPTS := $(filter-out benchmarks/datasets.py $(BENCH_MODULES:%=benchmarks/%.py),$(wildcard benchmarks/*.py))

bench: $(STAMP)
	@for b in $(BENCH_SCRIPTS); do echo "== $$b"; $(BIN)/python $$b || exit 1; done
	@echo "== python -m benchmarks.label_efficiency"
	$(BIN)/python -m benchmarks.label_efficiency
	@echo "== python -m benchmarks.annotation_effort --out docs"
	$(BIN)/python -m benchmarks.annotation_effort --out docs
	@echo "== python -m benchmarks.adaptation_gain --out docs"
	$(BIN)/python -m benchmarks.adaptation_gain --out docs
	@echo "== python -m benchmarks.ontile_rule"
	$(BIN)/python -m benchmarks.ontile_rule

clean-venv:
	rm -rf $(VENV)
