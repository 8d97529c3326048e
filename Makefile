# Two commands do all set-up on a fresh machine:
#   make demo   installs into .venv and runs the demo on embedded defaults
#   make test   installs into .venv (with test extras) and runs the test suite
PYTHON ?= python3
VENV   ?= .venv
BIN    := $(VENV)/bin
OUT    ?= demo-output

.PHONY: demo test install install-test browser bench clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip

install: $(BIN)/python
	$(BIN)/python -m pip install --quiet -e .

install-test: $(BIN)/python browser
	$(BIN)/python -m pip install --quiet -e ".[test]"
	$(BIN)/python -m ipykernel install --user --name poolbandit >/dev/null

# Headless Chromium (Debian's package) renders the HTML reports in the tests.
browser:
	@command -v chromium >/dev/null 2>&1 || { \
	  if [ "$$(id -u)" = 0 ]; then apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq chromium >/dev/null; \
	  else sudo apt-get update -qq && sudo DEBIAN_FRONTEND=noninteractive apt-get install -y -qq chromium >/dev/null; fi; }

demo: install
	$(BIN)/poolbandit demo --out $(OUT)

test: install-test
	$(BIN)/python -m pytest -q

bench: install
	for f in benchmarks/*.py; do $(BIN)/python $$f || exit 1; done

clean:
	rm -rf $(VENV) $(OUT) .pytest_cache
