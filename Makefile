# Two commands for a fresh machine: `make demo` and `make test`.
PYTHON ?= python3
VENV   ?= .venv
PY     := $(VENV)/bin/python
STAMP  := $(VENV)/.installed

.PHONY: demo test venv examples bench clean

$(PY):
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip

$(STAMP): pyproject.toml | $(PY)
	$(PY) -m pip install --quiet -e '.[test]'
	touch $(STAMP)

venv: $(STAMP)

examples:
	@if command -v cc >/dev/null 2>&1; then \
		$(MAKE) -C examples/c_kernel --no-print-directory; \
	else \
		echo "examples: no C compiler found; the demo uses the NumPy drafts"; \
	fi

demo: $(STAMP) examples
	$(PY) examples/demo.py --out demo-out

test: $(STAMP) examples
	$(PY) -m pytest -p no:cacheprovider -n 2 tests

bench: $(STAMP)
	$(PY) benchmarks/bench_oracle.py

clean:
	rm -rf $(VENV) demo-out build *.egg-info
	-$(MAKE) -C examples/c_kernel clean --no-print-directory
