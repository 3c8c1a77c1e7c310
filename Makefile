# Two entry points for a fresh machine: `make demo` and `make test`.
# Both create .venv and install flipfix with its pinned ranges first.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: demo test bench bench-quick proto clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip
	$(BIN)/pip install --quiet -e '.[test]'
	@echo "compiling the search and growing kernels (once per machine, on two cores; cached beside the kernel modules)"
	$(BIN)/python -c "from flipfix.repair.kernels.readiness import warm_up; warm_up(grow=True)"
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/flipfix demo

test: $(STAMP)
	scripts/ensure_postgres.sh
	$(BIN)/python -m pytest -q

# the benchmarks also need the bench extra (the reference annealer of the rerun section)
BENCH_STAMP := $(VENV)/.installed-bench

$(BENCH_STAMP): $(STAMP)
	$(BIN)/pip install --quiet -e '.[test,bench]'
	touch $(BENCH_STAMP)

bench: $(BENCH_STAMP)
	$(BIN)/python -m bench.run

bench-quick: $(BENCH_STAMP)
	$(BIN)/python -m bench.run --quick

proto: $(STAMP)
	$(BIN)/python scripts/generate_proto.py

clean:
	rm -rf $(VENV) build *.egg-info
