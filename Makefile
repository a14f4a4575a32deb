# lotgate: set up a virtual environment and run the demo or the tests.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: demo test lint bench clean system-packages

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip
	$(BIN)/pip install --quiet -e '.[test]'
	touch $(STAMP)

## demo: set up, then run the invented plant's nights into ./lotgate-demo
demo: $(STAMP)
	$(BIN)/lotgate demo --workspace ./lotgate-demo

## system-packages: poppler-utils (pdfsig, pdftotext) for the signature cross-checks, when root
system-packages:
	@if command -v pdfsig >/dev/null 2>&1; then :; \
	elif [ "$$(id -u)" = "0" ] && command -v apt-get >/dev/null 2>&1; then \
	  (apt-get install -y -qq poppler-utils >/dev/null 2>&1 || \
	   (apt-get update -qq >/dev/null 2>&1 && apt-get install -y -qq poppler-utils >/dev/null 2>&1)) || \
	  echo "note: could not install poppler-utils; the pdfsig checks will be skipped"; \
	else echo "note: pdfsig (Debian package poppler-utils) not found; the pdfsig checks will be skipped"; fi

## test: set up, then run the whole test suite
test: $(STAMP) system-packages
	$(BIN)/python -m pytest -q
	$(BIN)/lint-imports

lint: $(STAMP)
	$(BIN)/ruff check pipeline flows tests
	$(BIN)/lint-imports

bench: $(STAMP)
	$(BIN)/lotgate bench --lots 1000

clean:
	rm -rf $(VENV) lotgate-demo .pytest_cache build *.egg-info
