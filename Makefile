# The two commands in the README's quick start are `make demo` and `make test`.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: setup demo test bench clean

# setup compiles the numba fitting kernels once (about 40 s, a message says so) into
# ~/.cache/kinemap/<version>/numba (kinemap/_kernel_cache.py; NUMBA_CACHE_DIR overrides);
# it is quick when they are cached already, also after a re-install of the same version.

setup: $(STAMP)

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test]'
	$(BIN)/python -c 'from kinemap.linefit._compile import warm; warm()'
	$(BIN)/python -m kinemap.pipeline.warm
	touch $(STAMP)

demo: setup
	$(BIN)/kinemap demo --out kinemap-demo --overwrite

test: setup
	$(BIN)/python -m pytest -q

bench: setup
	$(BIN)/python benchmarks/moments.py

clean:
	rm -rf $(VENV) kinemap-demo kinemap-out .pytest_cache
