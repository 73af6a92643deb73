# Two entry points: `make demo` and `make test`. Both create the environment on first use.
VENV := .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.installed

# Find a Python >= 3.12 even where `python3` is older (pyenv, distro packages, or PYTHON=...).
FIND_PY := for c in $(PYTHON) python3.13 python3.12 python3 $$(ls -d $$HOME/.pyenv/versions/3.1[2-9]*/bin/python 2>/dev/null | sort -rV) /usr/bin/python3; do \
	  if command -v $$c >/dev/null 2>&1 && $$c -c 'import sys; sys.exit(0 if sys.version_info >= (3, 12) else 1)' 2>/dev/null; then echo $$c; break; fi; \
	done

.PHONY: demo test lint bench clean

$(STAMP): pyproject.toml
	@py=$$($(FIND_PY)); \
	if [ -z "$$py" ]; then echo "bayesdid needs Python 3.12 or newer; none found. Install one, or run: make PYTHON=/path/to/python3.12 test" >&2; exit 2; fi; \
	echo "using $$py ($$($$py --version))"; \
	[ -x $(PY) ] || $$py -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e ".[test]"
	@touch $(STAMP)

demo: $(STAMP)
	$(VENV)/bin/bayesdid demo --out runs/demo

test: $(STAMP)
	$(PY) -m pytest -q $(PYTEST_ARGS)

# ruff, configured in pyproject.toml ([tool.ruff]): lint and format; .ci/run calls it before the tests
lint: $(STAMP)
	$(VENV)/bin/ruff check bayesdid tests
	$(VENV)/bin/ruff format --check bayesdid tests

bench: $(STAMP)
	$(VENV)/bin/bayesdid bench collapse

clean:
	rm -rf $(VENV) runs .pytest_cache
