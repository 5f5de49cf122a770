# Morrow: every set-up step lives here so a fresh machine needs only `make demo` or `make test`.
PYTHON ?= python3
VENV   ?= .venv
BIN    := $(VENV)/bin
DB     ?= sqlite:///morrow.db
HOST   ?= 127.0.0.1
PORT   ?= 8000
HL7_PORT ?= 2575

.PHONY: demo test bench stress lint venv install install-test serve demo-data clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip

# The stamp files make re-runs fast: pip runs again only when pyproject.toml changes.
$(VENV)/.installed: pyproject.toml | $(BIN)/python
	$(BIN)/pip install --quiet -e .
	touch $@

$(VENV)/.installed-test: pyproject.toml | $(BIN)/python
	$(BIN)/pip install --quiet -e '.[test,dev]'
	touch $@ $(VENV)/.installed

install: $(VENV)/.installed
install-test: $(VENV)/.installed-test

demo: install
	$(BIN)/morrow --db $(DB) db upgrade
	$(BIN)/morrow --db $(DB) demo load
	MORROW_NOW=$$($(BIN)/morrow --db $(DB) demo now) $(BIN)/morrow --db $(DB) demo train
	$(BIN)/morrow --db $(DB) demo users
	@echo "Open http://$(HOST):$(PORT)/ and sign in with one of the accounts above (Ctrl-C stops the server)."
	@echo "The page replays the demo's last census morning (MORROW_NOW); unset it for the real clock."
	@echo "HL7 v2 messages (MLLP) are taken on $(HOST):$(HL7_PORT) while it runs (README: live feeds)."
	$(BIN)/morrow --db $(DB) listen --host $(HOST) --port $(HL7_PORT) & listener=$$!; \
	trap 'kill $$listener 2>/dev/null' EXIT INT TERM; \
	MORROW_NOW=$$($(BIN)/morrow --db $(DB) demo now) $(BIN)/morrow --db $(DB) serve --host $(HOST) --port $(PORT)

# .ci/postgres starts a throwaway PostgreSQL server for the tests that run on both databases
# (when Debian's postgresql package is installed; otherwise those tests skip, or fail under CI).
test: install-test
	bash .ci/postgres with $(BIN)/python -m pytest -q tests --ignore=tests/benchmarks

bench: install-test
	bash .ci/postgres with $(BIN)/python -m pytest -q tests/benchmarks -s -p no:randomly

# The stress units (tests/stress/generator.py), backtested through the command line; outside CI
# (252 mornings per unit, about 8 minutes on an idle 2-core machine). Results and the table go
# to stress-results/.
stress: install-test
	$(BIN)/python -m tests.stress.run --out stress-results

lint: install-test
	$(BIN)/ruff check app tests migrations
	$(BIN)/mypy app

# Regenerates the committed demo CSVs (seeded, deterministic).
demo-data: install
	$(BIN)/python -m app.demo.generate --out demo_data

clean:
	rm -rf $(VENV) morrow.db morrow.db-wal morrow.db-shm .pytest_cache
