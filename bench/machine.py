"""What the numbers were measured on."""
from __future__ import annotations

import datetime
import os
import platform

import onnxruntime as ort

# CPU flags that decide fp32 and int8 speed (Linux /proc/cpuinfo names): AVX2/AVX-512 and FMA for
# fp32, VNNI and AMX-INT8 (x86) or the dot-product and i8mm extensions (ARM) for int8.
FEATURES = ("avx2", "avx512f", "avx512_vnni", "avx_vnni", "amx_int8", "fma", "neon", "asimd", "asimddp",
            "i8mm")


def cpu_model() -> str:
    try:
        for line in open("/proc/cpuinfo"):
            if line.lower().startswith(("model name", "hardware", "cpu model")):
                return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or platform.machine()


def cpu_features() -> list[str]:
    try:
        text = open("/proc/cpuinfo").read()
    except OSError:
        return []
    flags = set()
    for line in text.splitlines():
        if line.lower().startswith(("flags", "features")):
            flags |= set(line.split(":", 1)[1].split())
    return [f for f in FEATURES if f in flags]


def describe() -> dict:
    return {"cpu": cpu_model(), "features": cpu_features(), "cores": os.cpu_count(),
            "arch": platform.machine(), "os": f"{platform.system()} {platform.release()}",
            "python": platform.python_version(), "onnxruntime": ort.__version__,
            "date": datetime.datetime.now().astimezone().isoformat(timespec="seconds")}
