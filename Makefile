# stationflow: two commands on a fresh clone — `make demo` and `make test`.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP_RUN := $(VENV)/.installed-run
STAMP_TEST := $(VENV)/.installed-test
OUT ?= demo_output

.PHONY: demo demo-night demo-town report-check test fuzz coverage bench bench-follow sample-data clean help

help:
	@echo "make demo       run the frost-night demo end to end and print where the report is"
	@echo "make demo-night replay the frost night through the follow mode (budget --follow): now.html and alerts.jsonl"
	@echo "make demo-town  run the PM2.5 town demo"
	@echo "make test       run the whole test suite"
	@echo "make report-check  both demos, then their reports in a headless browser (screenshots) with every figure captioned"
	@echo "make fuzz       the whole-pipeline property test with many examples (not part of make test)"
	@echo "make coverage   the coverage suite at full size: do stated errors cover the truth? (not part of make test)"
	@echo "make bench      run the benchmarks (not part of make test)"
	@echo "make bench-follow  the follow mode's CPU per new 5-minute step on 300 stations"
	@echo "make sample-data regenerate sample_data/ from stationflow.scenarios.synthetic"

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip

$(STAMP_RUN): pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install --quiet -e .
	@touch $@

$(STAMP_TEST): pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install --quiet -e ".[test]"
	@touch $@ $(STAMP_RUN)

demo: $(STAMP_RUN)
	$(BIN)/stationflow demo --scenario frost --out $(OUT)/frost

demo-night: $(STAMP_RUN)
	$(BIN)/stationflow demo --scenario frost --night --out $(OUT)/night

demo-town: $(STAMP_RUN)
	$(BIN)/stationflow demo --scenario town --out $(OUT)/town

report-check: $(STAMP_RUN)
	$(BIN)/stationflow demo --scenario frost --out $(OUT)/frost --quiet
	$(BIN)/stationflow demo --scenario town --out $(OUT)/town --quiet
	$(BIN)/python benchmarks/report_check.py $(OUT)/frost/report.html $(OUT)/town/report.html

test: $(STAMP_TEST)
	$(BIN)/python -m pytest -q

fuzz: $(STAMP_TEST)
	STATIONFLOW_FUZZ_EXAMPLES=$${STATIONFLOW_FUZZ_EXAMPLES:-300} $(BIN)/python -m pytest -q tests/test_property_pipeline.py

coverage: $(STAMP_TEST)
	$(BIN)/python benchmarks/coverage.py

bench: $(STAMP_TEST)
	$(BIN)/python benchmarks/run.py
	$(BIN)/python benchmarks/follow.py

bench-follow: $(STAMP_TEST)
	$(BIN)/python benchmarks/follow.py

sample-data: $(STAMP_RUN)
	$(BIN)/python -m stationflow.scenarios.synthetic sample_data

clean:
	rm -rf $(VENV) $(OUT) .pytest_cache
