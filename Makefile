# Two commands set everything up on a fresh machine: `make demo` and `make test`.
PYTHON ?= python3
VENV   ?= .venv
PY     := $(VENV)/bin/python
TIMBREL := $(VENV)/bin/timbrel
DEMO_OUT ?= out/demo
# pytest selection for `make test`: everything but the slow checks (run by `make test-all`)
TEST_ARGS ?= -m "not slow"

.PHONY: demo test test-all bench lint speech-deps bench-deps clean

# The venv is rebuilt whenever pyproject.toml changes.
$(VENV)/.installed: pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e '.[test,plot,dask,store]'
	touch $@

demo: $(VENV)/.installed
	PY=$(PY) TIMBREL=$(TIMBREL) OUT=$(DEMO_OUT) bash scripts/demo.sh

# espeak-ng (Debian) speaks the words of the spoken-word tests; installed when missing and
# this user may (as on CI), otherwise those tests skip and say how to enable them.
speech-deps:
	@command -v espeak-ng >/dev/null 2>&1 || { \
	  if [ "$$(id -u)" = 0 ] && command -v apt-get >/dev/null 2>&1; then \
	    echo "installing espeak-ng for the spoken-word tests"; \
	    (apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq espeak-ng >/dev/null) \
	      || echo "could not install espeak-ng; spoken-word tests will be skipped"; \
	  else echo "espeak-ng missing: spoken-word tests will be skipped (apt-get install espeak-ng)"; fi; }

test: $(VENV)/.installed speech-deps
	$(PY) -m pytest $(TEST_ARGS)

test-all: $(VENV)/.installed speech-deps
	$(PY) -m pytest

# The development suite of bench/bench_quality.py renders instrument notes with FluidSynth
# from four sound sets and reads recorded drum kits (Debian packages, installed when
# missing and this user may).
BENCH_DEBS := fluidsynth fluid-soundfont-gm musescore-general-soundfont-small \
	csound-soundfont timgm6mb-soundfont hydrogen-drumkits
bench-deps:
	@missing=$$(for p in $(BENCH_DEBS); do dpkg -s $$p >/dev/null 2>&1 || echo $$p; done); \
	if [ -n "$$missing" ]; then \
	  if [ "$$(id -u)" = 0 ] && command -v apt-get >/dev/null 2>&1; then \
	    echo "installing $$missing for the quality benchmark"; \
	    apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq $$missing >/dev/null; \
	  else echo "missing for bench_quality: $$missing (apt-get install them)"; fi; fi

bench: $(VENV)/.installed speech-deps bench-deps
	$(PY) bench/run.py --out bench/results.json

lint: $(VENV)/.installed
	$(PY) -m pip install --quiet -e '.[dev]'
	$(PY) -m ruff check src tests bench
	$(PY) -m mypy

clean:
	rm -rf $(VENV) out .pytest_cache
