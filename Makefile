# Two commands for people: `make demo` and `make test`. Both create .venv with a Python >= 3.12
# found on this machine (tools/find_python.sh) and install the package into it.
VENV   := .venv
PY     := $(VENV)/bin/python
STAMP  := $(VENV)/.installed
# One BLAS thread per process: parallelism comes from chains, Numba threads and workers (docs/numerics.md).
export OPENBLAS_NUM_THREADS := 1
export OMP_NUM_THREADS := 1
export MKL_NUM_THREADS := 1
export MPLBACKEND := Agg

.PHONY: demo test test-slow bench clean

$(STAMP): pyproject.toml
	@set -e; py=$$(sh tools/find_python.sh); echo "make: using $$py"; \
	test -x $(PY) || $$py -m venv $(VENV); \
	$(PY) -m pip install --quiet --upgrade pip; \
	$(PY) -m pip install --quiet -e '.[test,dask]'; \
	touch $(STAMP)

demo: $(STAMP)
	$(VENV)/bin/bayesgeo demo --out demo-run --overwrite

test: $(STAMP)
	$(PY) -m pytest -m "not slow" -n 2 --dist loadfile

test-slow: $(STAMP)
	$(PY) -m pytest -m slow

bench: $(STAMP)
	$(PY) bench/run_all.py

clean:
	rm -rf $(VENV) demo-run .pytest_cache
