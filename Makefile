# Every target creates .venv on first use and installs crankbeat into it.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed

.PHONY: demo test bench quality fixtures fuzz lint clean

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/python scripts/demo.py

test: $(STAMP)
	$(BIN)/python -m pytest -q

bench: $(STAMP)
	$(BIN)/python scripts/bench.py

# Misfire/layout/interval verdicts on simulated rides the analyser is not told (~15-20 min).
quality: $(STAMP)
	$(BIN)/python scripts/quality.py

fuzz: $(STAMP)
	$(BIN)/python scripts/fuzz.py

fixtures: $(STAMP)
	$(BIN)/python scripts/make_fixtures.py

lint: $(STAMP)
	$(BIN)/python -m pip install --quiet ruff
	$(BIN)/ruff check crankbeat logger dsp tests scripts bench

clean:
	rm -rf $(VENV) build *.egg-info demo-out
