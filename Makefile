# luforge: every target makes its own virtual environment first (.venv), so a fresh clone needs only make.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed
SPEC   := generated/kernels.toml
# regeneration checks need only jinja2: use the venv when it exists, else the system Python
GENPY  := $(shell [ -x $(BIN)/python ] && echo $(BIN)/python || echo $(PYTHON))

.PHONY: tune-check venv demo test target-check check-generated regenerate golden bench bench-small bench-large firmware-check clean

$(STAMP): pyproject.toml setup.py
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

venv: $(STAMP)

# the main job on the built-in example: generate the catalogue, build and verify it, run the scenario
demo: $(STAMP)
	$(BIN)/luforge generate $(SPEC)
	$(BIN)/luforge verify $(SPEC)
	$(BIN)/python examples/tidal_station.py

test: $(STAMP)
	$(BIN)/python -m pytest -q -n 2 tests

# every catalogue kernel cross-built, run and judged on every row of the target table (emulated where needed)
target-check: $(STAMP)
	$(BIN)/luforge verify $(SPEC) --target all

# generated/ must be exactly what the generator makes from its spec
# tune's winner against an independent harness: a small sweep here (CI); the full one is
# `$(BIN)/python bench/tune_check.py` (n = 4..16, double and float, host and cortex-m4f)
tune-check: $(STAMP)
	$(BIN)/python bench/tune_check.py --n 4,8 --scalar float --target host,cortex-m4f --sample 6

check-generated:
	@tmp=$$(mktemp -d); trap 'rm -rf "$$tmp"' EXIT; \
	  $(GENPY) -m derive.cli generate $(SPEC) -o $$tmp >/dev/null || { echo "generate failed on $(SPEC)"; exit 1; }; \
	  ls $$tmp/*.c >/dev/null 2>&1 || { echo "generate wrote no kernels from $(SPEC)"; exit 1; }; \
	  for f in $$tmp/*; do cmp -s $$f generated/$$(basename $$f) || { echo "differs: generated/$$(basename $$f)"; exit 1; }; done; \
	  for f in generated/*.c generated/*.h generated/*.py generated/*.cmake generated/*.mk; do \
	    [ -e $$tmp/$$(basename $$f) ] || { echo "stale: $$f"; exit 1; }; done

regenerate:
	rm -f generated/*.c generated/*.h generated/*.py generated/*.cmake generated/*.mk
	$(GENPY) -m derive.cli generate $(SPEC)

golden: $(STAMP)
	LUFORGE_UPDATE_GOLDEN=1 $(BIN)/python -m pytest -q tests/test_golden.py

# MISRA C:2012 (cppcheck's addon) over every emitted file of the catalogue; `make test` checks a sample
firmware-check: $(STAMP)
	LUFORGE_MISRA_ALL=1 $(BIN)/python -m pytest -q tests/test_firmware.py -k misra

# every bench file in one go; each also has its own target (bench-small: small n against Eigen and LAPACK)
bench: $(STAMP)
	$(BIN)/python bench/bench.py
	@for f in bench/small.py bench/batched.py bench/firmware.py; do [ ! -e $$f ] || $(BIN)/python $$f || exit 1; done
	$(MAKE) --no-print-directory bench-large

bench-small: $(STAMP)
	$(BIN)/python bench/small.py

# large n against OpenBLAS, one pinned core; OpenBLAS picks its own core type (the variables are unset here only)
bench-large: $(STAMP)
	taskset -c 1 env -u OPENBLAS_CORETYPE -u OPENBLAS_L2_SIZE OPENBLAS_NUM_THREADS=1 $(BIN)/python bench/large.py

clean:
	rm -rf $(VENV) build *.egg-info .pytest_cache .hypothesis
