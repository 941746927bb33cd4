"""Run a module with `import torch` (and onnx) made to fail, as on a board without them.

Usage: python torch_blocker.py MODULE [ARGS...]   (runs MODULE as __main__)
BLOCK_MODULES=a,b,c in the environment blocks those top-level packages instead.
"""
import importlib.abc
import os
import runpy
import sys

BLOCKED = tuple(os.environ.get("BLOCK_MODULES", "torch,torchvision,onnx").split(","))


class _Block(importlib.abc.MetaPathFinder):
    def find_spec(self, name, path=None, target=None):
        if name.split(".")[0] in BLOCKED:
            raise ModuleNotFoundError(f"No module named {name!r} (blocked for this test)", name=name)
        return None


sys.meta_path.insert(0, _Block())
for mod in list(sys.modules):
    if mod.split(".")[0] in BLOCKED:
        del sys.modules[mod]

if __name__ == "__main__":
    module = sys.argv[1]
    sys.argv = [module] + sys.argv[2:]
    runpy.run_module(module, run_name="__main__", alter_sys=True)
