# requant: set-up, demo, tests and benchmarks.
# Each target installs what it needs into ./.venv on first use.

PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed-stamp
BROWSER_STAMP := $(VENV)/.browser-stamp

.PHONY: demo test test-fast lint bench clean

$(STAMP): pyproject.toml
	@echo "setting up ./.venv: requant and what it needs (numpy, scipy, soundfile, numba, typer,"
	@echo "matplotlib, jinja2, dask.distributed; for the tests pytest, hypothesis, selenium, ruff, pyloudnorm);"
	@echo "first run only, a few minutes"
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test,cluster]'
	touch $(STAMP)

# The listening page is tested in a real headless browser: Debian's chromium and chromedriver.
# Installing them needs root (CI runs as root); elsewhere the browser test is skipped.
$(BROWSER_STAMP): $(STAMP)
	@if command -v chromium >/dev/null && command -v chromedriver >/dev/null; then :; \
	elif [ "$$(id -u)" = 0 ] && command -v apt-get >/dev/null; then \
	  { apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq chromium chromium-driver >/dev/null; } \
	  || echo "note: installing chromium failed: the browser test will be skipped"; \
	else echo "note: chromium not installed and not root: the browser test will be skipped"; fi
	touch $(BROWSER_STAMP)

demo: $(STAMP)
	$(BIN)/requant demo --out demo_output --overwrite

# The whole suite, after the linter (CI runs this).
test: $(STAMP) $(BROWSER_STAMP) lint
	$(BIN)/python -m pytest

# The edit loop: everything but the tests marked slow (cluster, browser, process kills,
# fresh kernel compiles); under a minute once the kernels are compiled.
test-fast: $(STAMP)
	$(BIN)/python -m pytest -m "not slow" -q

lint: $(STAMP)
	$(BIN)/ruff check requant tests benchmarks demo_audio

bench: $(STAMP)
	$(BIN)/python benchmarks/bench_convert.py
	$(BIN)/python benchmarks/bench_silence.py
	$(BIN)/python benchmarks/bench_batch.py
	$(BIN)/python benchmarks/bench_audit.py
	$(BIN)/python benchmarks/bench_resume_index.py --sizes 10000,200000
	$(BIN)/python benchmarks/bench_scale.py --quick

clean:
	rm -rf $(VENV) demo_output bench_output .pytest_cache
