# Two commands set up everything on a fresh machine with Python 3.11: `make demo` and `make test`.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed
DEMO_OUT ?= demo-output

export FLWR_TELEMETRY_ENABLED := 0
export FLWR_DISABLE_UPDATE_CHECK := 1

.PHONY: install constraints demo test lint clean browser postgres validate-stats fuzz bench audit-campaign audit-simulatable audit-whole

$(STAMP): pyproject.toml constraints.txt
	@test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -c constraints.txt -e ".[test]"
	@touch $(STAMP)

install: $(STAMP)

# Pin what .venv holds now (after a change to pyproject.toml's dependencies: install without the pins, then
# run this and `make test`). The file's first lines say why it exists.
constraints:
	@test -x $(BIN)/python || (echo "make constraints: no .venv; run make install first" >&2; exit 1)
	@{ sed -n '/^#/p' constraints.txt; $(BIN)/python -m pip freeze --exclude-editable; } > constraints.txt.new
	@mv constraints.txt.new constraints.txt
	@echo "constraints.txt: $$(grep -c '==' constraints.txt) packages pinned"

demo: $(STAMP)
	$(BIN)/federation demo --out-dir $(DEMO_OUT)

# The report tests open the HTML report in a real headless browser: Debian's chromium, installed when missing.
browser:
	@command -v chromium >/dev/null 2>&1 || (apt-get update && DEBIAN_FRONTEND=noninteractive apt-get install -y chromium)

# The site-agent source tests start their own PostgreSQL server on loopback: Debian's postgresql, installed
# when pg_ctl/initdb are missing.
postgres:
	@(command -v pg_ctl && command -v initdb) >/dev/null 2>&1 || ls /usr/lib/postgresql/*/bin/initdb >/dev/null 2>&1 \
		|| (apt-get update && DEBIAN_FRONTEND=noninteractive apt-get install -y postgresql)

test: $(STAMP) browser postgres
	$(BIN)/ruff check federation site_agent simulations tests fuzz
	$(BIN)/python -m pytest -q

# Simulation study of the pooling methods (not part of `make test`): bias and coverage of every method in three
# scenarios (300 consortia each; VALIDATE_QUICK=1: 60 each, under 10 minutes); prints a table per scenario,
# writes simulations/validate_stats_results.json.
VALIDATE_QUICK ?=
validate-stats: $(STAMP)
	$(BIN)/python -m simulations.validate_stats $(if $(VALIDATE_QUICK),--quick,--consortia 300)

# Benchmarks (not part of `make test`): every cost as a ratio to a baseline measured in the same run; prints a
# table, writes bench/results.json. BENCH_QUICK=1: 1M/3M records, 20/100 sites; BENCH_DEPLOY=1: also 3 and 10
# sites over a loopback TLS deployment (a validation round against a readiness check of the same sites).
bench: $(STAMP)
	$(BIN)/python -m simulations.bench $(if $(BENCH_QUICK),--quick) $(if $(BENCH_DEPLOY),--deploy)

# Coverage-guided fuzzing (atheris, installed into the venv on demand) of every parser that reads another
# party's bytes: FUZZ_SECONDS per target (default 600). Findings land in fuzz/findings/ and stop the run.
FUZZ_SECONDS ?= 600
FUZZ_TARGETS ?= request signed_request release bundle_frame bundle_body scorecard schema mapping policy
fuzz: $(STAMP)
	@$(BIN)/python -c "import atheris" 2>/dev/null || $(BIN)/python -m pip install --quiet atheris
	@for target in $(FUZZ_TARGETS); do \
		echo "fuzz: $$target for $(FUZZ_SECONDS) s"; \
		$(BIN)/python -m fuzz.run $$target --seconds $(FUZZ_SECONDS) || exit 1; \
	done

# A recipient who reruns the site's disclosure algorithm on every table the stated facts allow (not part of
# `make test`; docs/threat-model.md, R12): random two-release requests over five cells, each count the rerun
# pins that the facts leave open, and which decision told it. About 4 minutes for the default 150 scenarios.
AUDIT_SEED ?= 3
AUDIT_SCENARIOS ?= 150
audit-campaign: $(STAMP)
	$(BIN)/python -m simulations.rerun --seed $(AUDIT_SEED) --scenarios $(AUDIT_SCENARIOS)

# The same requests under the site's protect and under a simulatable protector, which decides each count from
# what is public for every value it could take (not part of `make test`; docs/threat-model.md, R12): what the
# rerun tells of each, and how many counts each shows. The campaign's time and two or three minutes more.
audit-simulatable: $(STAMP)
	$(BIN)/python -m simulations.simulatable --seed $(AUDIT_SEED) --scenarios $(AUDIT_SCENARIOS)

# A recipient who reasons with whole numbers (not part of `make test`; docs/threat-model.md, R3): random requests
# of six cells beside a path of 70 more, released by the site's protect; each cell (AUDIT_WHOLE_FLAGS=--unions:
# each union of the six) that scipy's integer programs over the shown counts pin to 1..k-1. About 2 minutes.
AUDIT_WHOLE_SEED ?= 1
AUDIT_WHOLE_REQUESTS ?= 400
AUDIT_WHOLE_FLAGS ?=
audit-whole: $(STAMP)
	$(BIN)/python -m simulations.whole_numbers --seed $(AUDIT_WHOLE_SEED) --requests $(AUDIT_WHOLE_REQUESTS) $(AUDIT_WHOLE_FLAGS)

lint: $(STAMP)
	$(BIN)/ruff check federation site_agent simulations tests fuzz

clean:
	rm -rf $(DEMO_OUT) .pytest_cache
