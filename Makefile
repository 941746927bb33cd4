# Two commands do all set-up on a fresh machine (README):
#   make demo   core install (no torch: what a board runs), stylises the bundled demo clip
#   make test   full install (torch pinned to the CPU wheel), runs the test suite
VENV ?= .venv
PY := $(VENV)/bin/python
PIP := $(PY) -m pip
DEMO_FRAMES ?= 150
TORCH ?= torch==2.13.0

.PHONY: demo test test-slow clean

$(VENV)/.created:
	python3 -m venv $(VENV)
	$(PIP) install -q --upgrade pip
	touch $@

$(VENV)/.core: $(VENV)/.created pyproject.toml
	$(PIP) install -q -e .
	touch $@

# torch first and pinned: an unpinned torch pulls a multi-GB CUDA build (README).
$(VENV)/.dev: $(VENV)/.core pyproject.toml
	$(PIP) install -q "$(TORCH)"
	$(PIP) install -q -e '.[dev]'
	touch $@

demo: $(VENV)/.core
	$(VENV)/bin/limner live --source demo --frames $(DEMO_FRAMES) --resolution 640x360 --output out/demo-stylized.mp4

test: $(VENV)/.dev
	$(PY) -m pytest -q

test-slow: $(VENV)/.dev
	$(PY) -m pytest -q -m slow

clean:
	rm -rf $(VENV) out build *.egg-info
