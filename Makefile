# Two commands do all the set-up on a fresh machine: `make demo` and `make test`.
PY ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: demo test lint install clean bench

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PY) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

install: $(STAMP)

demo: $(STAMP)
	$(BIN)/samesource analyze sample_surveys/staff_survey.csv --design sample_surveys/staff_survey_design.json --missing fiml --out samesource-report
	@echo "Report written to samesource-report/report.json"

test: $(STAMP)
	$(BIN)/python -m pytest -q

lint: $(STAMP)
	$(BIN)/ruff check measurement service tests sample_surveys

bench: $(STAMP)
	$(BIN)/python tests/benchmarks/run_all.py

clean:
	rm -rf $(VENV) samesource-report
