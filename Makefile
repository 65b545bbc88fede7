# Two commands for a new user: `make demo` and `make test`.
PYTHON ?= python3
VENV   ?= .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed

.PHONY: install test demo bench lint typecheck clean mosquitto chromium screenshots

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)

$(STAMP): $(BIN)/python pyproject.toml
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

install: $(STAMP)

# Integration tests need a real Mosquitto; install Debian's when missing and we are root.
mosquitto:
	@if ! command -v mosquitto >/dev/null 2>&1 && [ ! -x /usr/sbin/mosquitto ]; then \
	  if [ "$$(id -u)" = "0" ] && command -v apt-get >/dev/null 2>&1; then \
	    apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq mosquitto mosquitto-clients; \
	  else \
	    echo "note: mosquitto not found and not root; broker tests will be skipped"; \
	  fi; \
	fi

# The board's browser tests drive Debian's Chromium through Playwright (Playwright's own
# browser download cannot work on a closed network); install it when missing and root.
chromium:
	@if [ ! -x /usr/bin/chromium ]; then \
	  if [ "$$(id -u)" = "0" ] && command -v apt-get >/dev/null 2>&1; then \
	    apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq chromium; \
	  else \
	    echo "note: /usr/bin/chromium not found and not root; browser tests will be skipped"; \
	  fi; \
	fi

test: install mosquitto chromium
	$(BIN)/python -m pytest

lint: install
	$(BIN)/ruff check daemon simulator tests benchmarks
	$(BIN)/mypy daemon simulator

typecheck: lint

# The demo needs a broker: Debian's mosquitto (installed when root), else the
# embedded pure-Python one from the optional extra.
demo: install mosquitto
	@if ! command -v mosquitto >/dev/null 2>&1 && [ ! -x /usr/sbin/mosquitto ]; then \
	  $(BIN)/python -m pip install --quiet -e '.[test,embedded-broker]'; \
	fi
	$(BIN)/hourwatch demo

bench: install mosquitto chromium
	$(BIN)/python -m benchmarks.run

# The board pictures in docs/ (the invented example ward, in Debian's Chromium).
screenshots: install chromium
	$(BIN)/python -m tests.screenshots docs

clean:
	rm -rf $(VENV) build *.egg-info .pytest_cache .mypy_cache .ruff_cache
