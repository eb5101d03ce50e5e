# Two commands set a fresh machine up: `make demo` and `make test`.
PYTHON ?= python3
VENV := .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.installed

.PHONY: install demo test bench bench-tuning bench-breadth bench-scale bench-quality bench-realistic clean

$(STAMP): pyproject.toml
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e '.[test]'
	touch $(STAMP)

install: $(STAMP)

demo: $(STAMP)
	$(PY) examples/frost/make_data.py --out examples/frost/stations.svm
	mkdir -p runs/frost
	$(VENV)/bin/bittune tune examples/frost/job.yaml -o runs/frost/config.yaml
	$(VENV)/bin/bittune replay runs/frost/config.yaml --job examples/frost/job.yaml
	@echo "config: runs/frost/config.yaml (study storage in runs/frost/config.run/)"
	@echo "report: runs/frost/config.run/report/report.html"

test: $(STAMP)
	$(PY) -m pytest -q

bench: $(STAMP)
	$(PY) benchmarks/engine.py

bench-tuning: $(STAMP)
	$(PY) benchmarks/tuning.py

bench-breadth: $(STAMP)
	$(PY) benchmarks/breadth.py

# The whole grid takes hours on 2 cores; `benchmarks/scale.py --only 50000x500x16` is the goal's
# configuration alone (about 20 minutes: three arms of 60 trials), `--quick` a smoke run.
bench-scale: $(STAMP)
	$(PY) benchmarks/scale.py

bench-quality: $(STAMP)
	nice -n 5 $(PY) benchmarks/quality.py

# About 5 minutes on 2 cores: minibatch steps, stochastic replay, fronts on two networks, transfer.
bench-realistic: $(STAMP)
	nice -n 5 $(PY) benchmarks/realistic.py

clean:
	rm -rf $(VENV) build src/*.egg-info .pytest_cache runs
