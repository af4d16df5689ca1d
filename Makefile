# Both targets create .venv/ in the repo root when it is missing.
# torch 2.14.1 / torchvision 0.29.1 are pinned for the development machines (see DEVELOPERS.md);
# pyproject.toml declares the ranges a user may install.
PY      := .venv/bin/python
PIP     := .venv/bin/pip
STAMP   := .venv/.installed
TORCH   ?= torch==2.14.1 torchvision==0.29.1

.PHONY: demo test bench venv clean

venv: $(STAMP)

$(STAMP): pyproject.toml
	test -x $(PY) || python3 -m venv .venv
	$(PIP) install -q --upgrade pip
	$(PIP) install -q $(TORCH)
	$(PIP) install -q -e '.[dev]'
	touch $(STAMP)

demo: $(STAMP)
	$(PY) -m adaptkit.demo

# Two pytest-xdist workers (one torch thread each, tests/conftest.py); whole files go to one worker, so a file's
# session caches (the adaptation tests' shared source-only runs) are computed once.
test: $(STAMP)
	OMP_NUM_THREADS=$${OMP_NUM_THREADS:-1} $(PY) -m pytest -q -n $${TEST_WORKERS:-2} --dist loadfile --durations=15

bench: $(STAMP)
	$(PY) benchmarks/run_all.py

clean:
	rm -rf .venv build dist src/*.egg-info
