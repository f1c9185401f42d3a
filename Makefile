# Set-up and everyday commands. Every target creates or reuses .venv.
PYTHON ?= python3
VENV ?= .venv
TORCH ?= torch==2.13.0
PY := $(VENV)/bin/python
# The torch stamp is named after the requested spec, so `make test TORCH=...` reinstalls.
empty :=
space := $(empty) $(empty)
TORCH_STAMP := $(VENV)/.stamp-$(subst =,_,$(subst <,_,$(subst >,_,$(subst $(space),_,$(TORCH)))))
PYTEST_ARGS ?=

.PHONY: demo test lint bench venv clean

demo: $(VENV)/.stamp-demo
	$(VENV)/bin/jostle demo

test: $(VENV)/.stamp-test
	$(VENV)/bin/ruff check kernel_side widgets tests benchmarks scripts
	$(VENV)/bin/lint-imports
	$(PY) -m pytest $(PYTEST_ARGS)

lint: $(VENV)/.stamp-test
	$(VENV)/bin/ruff check kernel_side widgets tests benchmarks scripts
	$(VENV)/bin/lint-imports

bench: $(VENV)/.stamp-test
	$(PY) benchmarks/run.py

venv: $(TORCH_STAMP)

$(PY):
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip

# The CPU torch wheel goes in first: an unpinned torch would pull a multi-GB CUDA build.
$(TORCH_STAMP): | $(PY)
	$(PY) -m pip install --quiet "$(TORCH)"
	touch $@

$(VENV)/.stamp-demo: pyproject.toml $(TORCH_STAMP)
	$(PY) -m pip install --quiet -e .
	touch $@

$(VENV)/.stamp-test: pyproject.toml $(TORCH_STAMP)
	$(PY) -m pip install --quiet -e ".[test]"
	touch $@

clean:
	rm -rf $(VENV) build *.egg-info
