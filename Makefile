# Two commands for a fresh machine: `make demo` and `make test`.
PYTHON ?= python3
VENV   ?= .venv
PY     := $(VENV)/bin/python
STAMP  := $(VENV)/.installed

.PHONY: demo test venv examples bench clean browser

$(PY):
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip

$(STAMP): pyproject.toml | $(PY)
	$(PY) -m pip install --quiet -e '.[test]'
	touch $(STAMP)

venv: $(STAMP)

examples:
	@if command -v cc >/dev/null 2>&1 && [ -f examples/c_kernel/Makefile ]; then \
		$(MAKE) -C examples/c_kernel --no-print-directory; \
	else \
		echo "examples: no C compiler found; the demo uses the NumPy drafts"; \
	fi

demo: $(STAMP) examples
	$(PY) examples/demo.py --out demo-out

# The report's browser test renders in Debian's chromium when it can be installed
# (root and apt-get present); otherwise that test is skipped with its reason.
browser:
	@if command -v chromium >/dev/null 2>&1 || command -v chromium-browser >/dev/null 2>&1; then :; \
	elif [ "$$(id -u)" = 0 ] && command -v apt-get >/dev/null 2>&1; then \
		echo "browser: installing Debian's chromium for the report's rendering test"; \
		(apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq chromium >/dev/null) \
			|| echo "browser: chromium could not be installed; the rendering test will be skipped"; \
	else echo "browser: no chromium and no way to install it; the rendering test will be skipped"; fi

test: $(STAMP) examples browser
	$(PY) -m pytest -p no:cacheprovider -n 2 tests

bench: $(STAMP)
	$(PY) benchmarks/bench_oracle.py

clean:
	rm -rf $(VENV) demo-out build *.egg-info
	-[ -f examples/c_kernel/Makefile ] && $(MAKE) -C examples/c_kernel clean --no-print-directory
