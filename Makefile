# mvkde: two commands on a fresh machine -- `make demo` and `make test`.
PYTHON ?= python3
VENV   ?= .venv
PY      = $(VENV)/bin/python
PIP     = $(PY) -m pip --disable-pip-version-check -q

.PHONY: demo test bench bench-smoke clean install

# (re)install when pyproject.toml changes; the stamp records which extras are in
$(VENV)/.stamp-base: pyproject.toml
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PIP) install -e .
	touch $@

$(VENV)/.stamp-plot: pyproject.toml
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PIP) install -e '.[plot]'
	touch $@ $(VENV)/.stamp-base

$(VENV)/.stamp-test: pyproject.toml
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PIP) install -e '.[test]'
	touch $@ $(VENV)/.stamp-base

$(VENV)/.stamp-bench: pyproject.toml
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PIP) install -e '.[test,bench]'
	touch $@ $(VENV)/.stamp-test $(VENV)/.stamp-base

install: $(VENV)/.stamp-base

demo: $(VENV)/.stamp-plot
	$(VENV)/bin/mvkde demo

test: $(VENV)/.stamp-test
	$(PY) -m pytest -q

bench: $(VENV)/.stamp-bench
	$(PY) benchmarks/run.py --out benchmarks/results.md
	$(PY) benchmarks/boundary_ise.py --out benchmarks/boundary_ise.md

bench-smoke: $(VENV)/.stamp-bench
	$(PY) benchmarks/run.py --smoke --out /tmp/mvkde-bench-smoke.md

clean:
	rm -rf $(VENV) out .pytest_cache build *.egg-info
