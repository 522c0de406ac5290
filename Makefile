PYTHON ?= python3

.PHONY: demo test lint typecheck warm install install-test

install:
	$(PYTHON) -m pip install -q -e .

install-test:
	$(PYTHON) -m pip install -q -e '.[test]'

# The main job on the embedded default: no server to install.
demo: install
	$(PYTHON) -m streamrate demo

# The whole test suite (integration tests start their own redis-server).
test: install-test
	$(PYTHON) -m ruff check streamrate tests bench
	$(PYTHON) -m mypy streamrate
	$(PYTHON) -m pytest

lint:
	$(PYTHON) -m ruff check streamrate tests bench
	$(PYTHON) -m ruff format --check streamrate tests bench

# Static types of the package (mypy with the pydantic plugin; settings in pyproject.toml).
typecheck: install-test
	$(PYTHON) -m mypy streamrate

# Compile every model kernel into the per-user cache (e.g. while building an image).
warm: install
	$(PYTHON) -m streamrate warm
