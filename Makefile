# stateworth: `make demo` and `make test` set everything up from a fresh clone (Python 3.11 + make).
PYTHON ?= python3
VENV := .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.installed
# large buffers on transparent huge pages (glibc >= 2.35; ignored elsewhere): see stateworth/config.py
GLIBC_TUNABLES ?= glibc.malloc.hugetlb=1
export GLIBC_TUNABLES

.PHONY: demo test bench proto lint clean venv

venv: $(STAMP)

$(STAMP): pyproject.toml
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) -m pip install -q --upgrade pip
	$(PY) -m pip install -q -e '.[all,test]'
	touch $(STAMP)

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
