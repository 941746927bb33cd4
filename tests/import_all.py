"""Import every submodule of limner.runtime and limner.bench; print how many."""
import importlib
import pkgutil
import sys

count = 0
for pkg_name in ("limner.runtime", "limner.bench"):
    pkg = importlib.import_module(pkg_name)
    for info in pkgutil.walk_packages(pkg.__path__, pkg_name + "."):
        importlib.import_module(info.name)
        count += 1
assert "torch" not in sys.modules and "onnx" not in sys.modules
print(f"imported {count} modules")
