# treewise: `make demo` and `make test` each set up .venv and build the extension on their own.
# `make help` lists the targets.

PYTHON ?= python3
VENV := .venv
PY := $(VENV)/bin/python
PIP := $(PY) -m pip
STAMP := $(VENV)/.installed
# Every dependency and extra named in pyproject.toml, so that the list lives in one place.
export DEPS_FROM_PYPROJECT := import tomllib; \
  p = tomllib.load(open("pyproject.toml", "rb"))["project"]; \
  extras = [d for g in ("test", "bench", "dev") for d in p["optional-dependencies"][g]]; \
  print("\n".join(p["dependencies"] + extras))

.DEFAULT_GOAL := help
.PHONY: help venv build build-dev demo test test-rust lint fmt bench fuzz fuzz-smoke clean

help: ## List the targets
	@grep -E '^[a-z-]+:.*## ' $(MAKEFILE_LIST) | awk -F':.*## ' '{printf "  make %-10s %s\n", $$1, $$2}'

$(STAMP): pyproject.toml
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PIP) install --quiet --upgrade pip
	$(PY) -c "$$DEPS_FROM_PYPROJECT" > $(VENV)/requirements.txt
	$(PIP) install --quiet "maturin>=1.9,<2" -r $(VENV)/requirements.txt
	touch $(STAMP)

venv: $(STAMP) ## Create .venv with every tool the targets need

build: $(STAMP) ## Build the extension in release mode into .venv
	$(VENV)/bin/maturin develop --release --quiet

build-dev: $(STAMP) ## Build the extension in debug mode (fast to compile, slow to run)
	$(VENV)/bin/maturin develop --quiet

demo: build ## Run the demo: fit a tree to built-in example data and print it
	$(PY) -m treewise.cli demo

test: build ## Run the Python test suite (the README's test command; CI runs it too)
	$(PY) -m pytest -q

test-rust: ## Run the Rust unit tests
	cargo test --workspace --quiet

lint: $(STAMP) ## Lint gates: rustfmt, clippy, ruff, mypy (CI runs these)
	cargo fmt --all --check
	cargo clippy --workspace --all-targets --quiet -- -D warnings
	$(VENV)/bin/ruff check python tests bench
	$(VENV)/bin/ruff format --check python tests bench
	$(VENV)/bin/mypy

fmt: $(STAMP) ## Format Rust and Python sources
	cargo fmt --all
	$(VENV)/bin/ruff format python tests bench

bench: build ## Benchmark against the numpy reference; privacy against utility; mixtures; writes bench/RESULTS.md
	$(PY) bench/fit_bench.py --write bench/RESULTS.md
	$(PY) bench/compare.py --write bench/RESULTS.md
	$(PY) bench/stream_bench.py --rows 20000000 --files 10 --dir bench/.data/stream-20m --write bench/RESULTS.md
	$(PY) bench/stream_bench.py --write bench/RESULTS.md
	$(PY) bench/compare_tables.py --write bench/RESULTS.md
	$(PY) bench/fidelity_real.py --write bench/RESULTS.md
	$(PY) bench/demo_bench.py --write bench/RESULTS.md
	$(PY) bench/privacy_utility.py --write bench/RESULTS.md
	$(PY) bench/mixture_bench.py --write bench/RESULTS.md
	$(PY) bench/mixture_bench.py --stream-rows 10000000 --write bench/RESULTS.md
	$(PY) bench/mixture_real.py --write bench/RESULTS.md

# Seconds per fuzz target: `make fuzz FUZZ_SECONDS=3600`; fuzz/run.sh also takes target names.
FUZZ_SECONDS ?= 600
FUZZ_SMOKE_SECONDS ?= 20

fuzz: build ## Fuzz every target for FUZZ_SECONDS each (needs cargo-fuzz; see fuzz/README.md)
	fuzz/run.sh $(FUZZ_SECONDS)

fuzz-smoke: build ## Replay past findings and fuzz every target for FUZZ_SMOKE_SECONDS (CI runs it)
	fuzz/run.sh $(FUZZ_SMOKE_SECONDS)

clean: ## Remove build products and the environment
	rm -rf target fuzz/target $(VENV) .pytest_cache .mypy_cache .ruff_cache
