# report-kit: the two commands a fresh machine needs are `make demo` and `make test`.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed
DEMO   ?= projects/tutoring-clubs

.PHONY: demo test venv bench clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip

$(STAMP): $(BIN)/python pyproject.toml
	$(BIN)/python -m pip install --quiet -e ".[test]"
	$(BIN)/python -m ipykernel install --sys-prefix --name python3 > /dev/null
	touch $(STAMP)

venv: $(STAMP)

demo: $(STAMP)
	$(BIN)/report-kit run $(DEMO)

test: $(STAMP)
	$(BIN)/python -m pytest

# bench: figures, not tests (about 35 minutes on 2 CPUs; each script prints ratios against a
# reference measured in the same run). The 10,000,000-unit run is by hand: see docs/performance.md.
bench: $(STAMP)
	$(BIN)/python benchmarks/randomization.py
	$(BIN)/python benchmarks/sampler.py
	$(BIN)/python benchmarks/engine_pass.py
	$(BIN)/python benchmarks/floor.py
	$(BIN)/python benchmarks/exact.py
	$(BIN)/python benchmarks/scale.py --units 20000 1000000
	$(BIN)/python benchmarks/scale.py --units 1000000 --arms 3 --outcomes 1 --workers 2
	$(BIN)/python benchmarks/workers.py

clean:
	rm -rf $(VENV) build *.egg-info
