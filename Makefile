# labbook — the two commands a newcomer runs are `make demo` and `make test`.
PYTHON ?= $(shell command -v python3.11 || command -v python3)
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed-$(shell cat pyproject.toml | cksum | cut -d' ' -f1)
HOST   ?= 127.0.0.1
PORT   ?= 8000
# Tests keep their secret key and scratch files apart from the demo's data.
TEST_DATA_DIR ?= $(CURDIR)/var/test

.PHONY: venv browser demo serve test lint bench load faults clean

venv: $(STAMP)

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test]'
	rm -f $(VENV)/.installed-*
	touch $@

demo: venv
	$(BIN)/python manage.py migrate --noinput
	$(BIN)/python manage.py collectstatic --noinput --verbosity 0
	$(BIN)/python manage.py demo
	@echo "Serving the demo lab on http://$(HOST):$(PORT)/ (Ctrl-C stops it)"
	$(BIN)/gunicorn labbook.wsgi --bind $(HOST):$(PORT) --workers 2 --access-logfile - --log-level warning

serve: venv
	$(BIN)/gunicorn labbook.wsgi --bind $(HOST):$(PORT) --workers 2 --access-logfile -

lint: venv
	$(BIN)/ruff check .
	$(BIN)/python manage.py makemigrations --check --dry-run

# The browser tests drive Debian's chromium (never a downloaded browser); this installs it
# where it is missing and the machine allows (see scripts/install-browser.sh).
browser:
	bash scripts/install-browser.sh

# Uses DATABASE_URL and REDIS_URL / CELERY_BROKER_URL when they are set (CI sets both).
test: venv lint browser
	LABBOOK_DATA_DIR=$(TEST_DATA_DIR) CELERY_TASK_DEFAULT_QUEUE=labbook-test-$$$$ \
		$(BIN)/python -m pytest $(PYTEST_ARGS)

bench: venv
	$(BIN)/python -m labbook.bench

# 20 clients for 2 minutes against gunicorn + PostgreSQL + Redis + two workers (loopback only).
load: venv
	$(BIN)/python -m labbook.bench.load

# Scripted fault scenarios (Redis stopped, worker killed, PostgreSQL restarted, disk full…).
faults: venv
	$(BIN)/python -m labbook.bench.faults

clean:
	rm -rf $(VENV) var .pytest_cache .ruff_cache
