# Quick start: `make demo` runs the main job on the bundled scenario, `make test` runs the tests.
# Both create .venv and install stimkit into it first.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.stimkit-installed
DEMO_OUT ?= demo-output

.PHONY: install test demo bench clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

install: $(STAMP)

test: $(STAMP)
	@$(BIN)/python -m pytest -q; rc=$$?; \
	if [ $$rc -eq 5 ]; then echo "pytest collected no tests"; exit 0; fi; exit $$rc

demo: $(STAMP)
	$(BIN)/stimkit demo -o $(DEMO_OUT)

bench: $(STAMP)
	@for f in bench/bench_*.py; do echo "== $$f"; $(BIN)/python $$f || exit 1; done

clean:
	rm -rf $(VENV) $(DEMO_OUT) .pytest_cache
