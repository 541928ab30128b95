# gr-coherer: `make demo` runs the built-in demo, `make test` the test suite.
# Both first run scripts/bootstrap.sh, which installs whatever is missing.
VENV := .venv
PY := $(VENV)/bin/python

.PHONY: setup demo test bench clean
setup:
	@bash scripts/bootstrap.sh

demo: setup
	$(VENV)/bin/coherer demo

test: setup
	$(PY) -m pytest

bench: setup
	$(VENV)/bin/coherer bench

clean:
	rm -rf build $(VENV)
