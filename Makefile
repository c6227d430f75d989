# stateworth: `make demo` and `make test` set everything up from a fresh clone (Python 3.11 + make).
PYTHON ?= python3
VENV := .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.installed
# large buffers on transparent huge pages (glibc >= 2.35; ignored elsewhere): see stateworth/config.py
GLIBC_TUNABLES ?= glibc.malloc.hugetlb=1
export GLIBC_TUNABLES

# the exact versions the tests and benchmarks run with (`make lock` writes it from the venv)
LOCK := requirements.lock

.PHONY: demo test bench proto lint clean venv lock

venv: $(STAMP)

# installs with the lock as constraints: a fresh clone gets exactly the tested versions (a
# dependency pyproject.toml names that the lock does not yet pin installs unpinned: `make lock`)
$(STAMP): pyproject.toml $(LOCK)
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) -m pip install -q --upgrade pip
	$(PY) -m pip install -q -c $(LOCK) -e '.[all,test]'
	touch $(STAMP)

# after changing a dependency (pyproject.toml, or `pip install -U NAME` in the venv) and running
# the tests: record what the venv holds, the project itself left out
lock:
	test -x $(PY) || { echo "no $(VENV): run make venv first"; exit 1; }
	{ echo "# written by make lock (pip freeze of $(VENV)): the versions the tests and benchmarks ran with;"; \
	  echo "# make venv installs with this file as constraints. Python $$($(PY) -c 'import sys; print(sys.version.split()[0])'), $$(uname -sm)"; \
	  $(PY) -m pip freeze --exclude-editable; } > $(LOCK).tmp
	mv $(LOCK).tmp $(LOCK)

# ruff (pyflakes and pycodestyle, configured in pyproject.toml) and mypy on the installed layout:
# the package maps top-level folders onto stateworth.* (pyproject's package-dir), so mypy reads a
# tree of links to them under build/typecheck
TYPECHECK := build/typecheck
lint: $(STAMP)
	$(VENV)/bin/ruff check stateworth rules solver estimation valuation server clients bench tests
	rm -rf $(TYPECHECK) && mkdir -p $(TYPECHECK)/stateworth
	for f in stateworth/*.py stateworth/py.typed; do ln -s ../../../$$f $(TYPECHECK)/stateworth/; done
	for d in rules solver estimation valuation server clients; do ln -s ../../../$$d $(TYPECHECK)/stateworth/$$d; done
	ln -s ../../../proto/stateworth/v1 $(TYPECHECK)/stateworth/v1
	cd $(TYPECHECK) && ../../$(VENV)/bin/mypy --config-file ../../pyproject.toml -p stateworth

demo: $(STAMP)
	$(VENV)/bin/stateworth demo

test: $(STAMP)
	$(PY) -m pytest tests

bench: $(STAMP)
	$(PY) bench/run.py

proto: $(STAMP)
	$(PY) -m grpc_tools.protoc -Iproto --python_out=proto --grpc_python_out=proto --pyi_out=proto proto/stateworth/v1/*.proto

clean:
	rm -rf $(VENV) .pytest_cache bench/out build *.egg-info
