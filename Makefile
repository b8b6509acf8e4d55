# Benchbook: the two commands of the README, and a few helpers.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed-$(shell cat requirements.txt requirements-dev.txt | cksum | cut -d' ' -f1)

.PHONY: demo test lint bench static clean

CHARTJS := frontend/static/frontend/vendor/chart.umd.min.js

$(STAMP): requirements.txt requirements-dev.txt
	@$(PYTHON) -c 'import sys; assert sys.version_info[:2] == (3, 11), "Benchbook needs Python 3.11"'
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet -r requirements.txt -r requirements-dev.txt
	@rm -f $(VENV)/.installed-* && touch $(STAMP)

## Front-end packages from the npm registry (pinned in frontend/package-lock.json),
## copied into the static files; nothing is fetched at run time.
static: $(CHARTJS)
$(CHARTJS): frontend/package.json frontend/package-lock.json
	npm ci --prefix frontend --no-audit --no-fund --silent
	mkdir -p $(dir $(CHARTJS))
	cp frontend/node_modules/chart.js/dist/chart.umd.min.js $(CHARTJS)

## The demo: migrate, seed the invented scenario (its three months replayed in this
## process: scoring, judging, sign-offs at their dates), then a worker and the web
## server on http://127.0.0.1:8000 (embedded SQLite + filesystem broker under var/).
## Settings refuse to start without a SECRET_KEY: the demo makes one (var/secret-key).
DEMO_KEY := var/secret-key
$(DEMO_KEY):
	@mkdir -p var && umask 077 && $(PYTHON) -c 'import secrets; print(secrets.token_urlsafe(50))' > $@

demo: $(STAMP) $(CHARTJS) $(DEMO_KEY)
	@export SECRET_KEY="$${SECRET_KEY:-$$(cat $(DEMO_KEY))}"; \
	  $(BIN)/python manage.py migrate --noinput -v0 && \
	  $(BIN)/python manage.py collectstatic --noinput -v0 && \
	  $(BIN)/python manage.py seed_demo && \
	  { $(BIN)/celery -A benchbook worker --beat --pool=solo --loglevel=warning & \
	    worker=$$!; trap "kill $$worker 2>/dev/null" EXIT INT TERM; \
	    $(BIN)/python manage.py runserver 127.0.0.1:8000 --noreload; }

## Run the whole test suite (engine doctests included).
test: $(STAMP) $(CHARTJS)
	$(BIN)/python -m pytest

lint: $(STAMP)
	$(BIN)/ruff check . && $(BIN)/ruff format --check .

## The engine against pycocotools and faster-coco-eval at full scale (a few minutes).
bench: $(STAMP)
	$(BIN)/python bench/engine_vs_reference.py

clean:
	rm -rf $(VENV) var bench/out frontend/node_modules $(dir $(CHARTJS))
