# Two commands set everything up on a fresh machine: `make demo` and `make test`.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed

.PHONY: demo test test-slow test-all bench lint mpy clean readme sysdeps

NECPP  := third_party/necpp

$(STAMP): pyproject.toml $(NECPP)/feedmatch-fixes.patch $(NECPP)/build_wheel.py
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install -q --upgrade pip
	@# NEC-2 engine with feedmatch's fixes, built once and cached; without a C++
	@# compiler the index's wheel is used and feedmatch warns about it.
	$(BIN)/python $(NECPP)/build_wheel.py --install || \
	  echo "warning: could not build the fixed necpp; using the index's (see $(NECPP)/README.md)"
	$(BIN)/python -m pip install -q -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/feedmatch demo --out demo-out

# The real parts some tests drive: Hamlib's rigctld and a headless chromium,
# from Debian's packages where this machine may install them; the tests that
# need them skip, saying why, where it cannot.
sysdeps:
	@# libhamlib-utils: rigctld, ampctld and ampctl (tests/board/test_follow.py, tests/web/test_hamlib_amp.py)
	@command -v rigctld >/dev/null 2>&1 && command -v ampctld >/dev/null 2>&1 && \
	  command -v chromium >/dev/null 2>&1 || \
	  { if command -v apt-get >/dev/null 2>&1 && [ "$$(id -u)" = 0 ]; then \
	      echo "installing Debian's libhamlib-utils (rigctld, ampctld, ampctl) and chromium with apt-get for the tests"; \
	      (apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq libhamlib-utils chromium) \
	        >/dev/null 2>&1 || echo "note: apt-get could not install libhamlib-utils/chromium; those tests skip"; \
	    else echo "note: rigctld, ampctld or chromium missing and apt-get not usable here; those tests skip"; fi; }

# The tests; the slow ones (marked slow: the emulated RP2040, the real browser, the wheel
# build, NEC-2 at every frequency) apart in test-slow. CI (.ci/run) runs both; test-all is one run of all.
# make test spreads its tests over TEST_JOBS processes (pytest-xdist; most tests wait on
# subprocesses, pseudo-terminals and sockets, so two workers halve the time on 2 cores);
# the slow ones time an emulated chip and run one at a time.
TEST_JOBS ?= 2
test: $(STAMP) sysdeps
	$(BIN)/python -m pytest -q -n $(TEST_JOBS) -m "not slow"

test-slow: $(STAMP) sysdeps
	$(BIN)/python -m pytest -q -m slow

test-all: $(STAMP) sysdeps
	$(BIN)/python -m pytest -q

bench: $(STAMP)
	$(BIN)/python host/benchmarks/run_bench.py

# Refresh the README's example outputs from real runs, and their cache tests/readme_runs.json
# (tests/test_readme.py checks the README against it while the files the runs executed are unchanged).
readme: $(STAMP)
	$(BIN)/python -m tests.readme_examples --write

lint: $(STAMP)
	$(BIN)/ruff check host tests firmware third_party

clean:
	rm -rf $(VENV) demo-out .pytest_cache .ruff_cache
