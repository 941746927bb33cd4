"""Run Limner's core on a 64-bit ARM software stack under emulation (`make arm-check`).

Builds a Debian bookworm arm64 root once (debootstrap, qemu-user-static through
binfmt_misc; cached in ~/.cache/limner/arm64-root, or $LIMNER_ARM_ROOT), copies this
checkout into it, installs the core exactly as the README tells a board user
(`python3 -m venv .venv && .venv/bin/pip install .`, no torch), and runs there:

  1. the torch-free import check,
  2. `limner live --source demo` headless for a few frames to a file (peak RSS taken),
  3. `limner int8-probe` (after `pip install onnx`, which it needs to write its test graphs),
  4. `limner bench` on two bundled candidates at a small size and frame count,
  5. every bundled model on the same frame as on this x86 host (bench/platform_outputs.py),

then compares the aarch64 outputs with the host's, model by model, and checks the int8
types chosen there and the onnxruntime version that pip resolved. Writes
out/arm-check/report.json (the slow test tests/test_arm_check.py reads it) and exits 1
when any model's difference exceeds its tolerance or a step fails.

Emulated timings say nothing about a real board's speed: qemu translates every
instruction; only the outputs, the install and the memory are facts about the board.
Needs root (chroot, mounts). Without qemu-user-static, binfmt-support and debootstrap it
installs them when run as root with --install-tools (the make target passes it).
"""
from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
ROOT = Path(os.environ.get("LIMNER_ARM_ROOT", Path.home() / ".cache" / "limner" / "arm64-root"))
OUT = REPO / "out" / "arm-check"
MIRROR = "http://deb.debian.org/debian"
SUITE = "bookworm"
# opencv-python's wheels link X libraries (libxcb, libGL, glib), which a board's desktop OS
# has and a minimal or "lite" image lacks: installing them is the board user's one extra
# step (README "Running on a board").
PACKAGES = "python3,python3-venv,python3-pip,ca-certificates,libxcb1,libgl1,libglib2.0-0"
READY = ".limner-root-ready"
BINFMT = Path("/proc/sys/fs/binfmt_misc")
GUEST_SRC = "/opt/limner"          # the checkout's copy inside the root
GUEST_OUT = "/opt/limner-out"      # what the guest writes for the host to read
HOST_CA = os.environ.get("SSL_CERT_FILE", "/etc/ssl/certs/ca-certificates.crt")
GUEST_CA = "/etc/ssl/certs/limner-host-ca.crt"
CANDIDATES = ("tiny4-ctx.onnx", "tiny4-ctx-int8.onnx")
REFERENCE = "half-ctx.onnx"
LIVE_FRAMES = 30


class CheckError(Exception):
    pass


def log(msg: str) -> None:
    print(f"arm-check: {msg}", flush=True)


def run(cmd: list[str], **kw) -> subprocess.CompletedProcess:
    return subprocess.run(cmd, check=True, **kw)


# ---- host tools -----------------------------------------------------------------------

def tools_missing() -> list[str]:
    missing = [t for t in ("debootstrap", "qemu-aarch64-static", "update-binfmts", "chroot")
               if not shutil.which(t)]
    if not (BINFMT / "qemu-aarch64").exists():
        missing.append("binfmt_misc entry qemu-aarch64")
    return missing


def install_tools() -> None:
    if os.geteuid() != 0:
        raise CheckError("needs root to install qemu-user-static, binfmt-support and debootstrap")
    log("installing qemu-user-static, binfmt-support, debootstrap (apt-get)")
    env = dict(os.environ, DEBIAN_FRONTEND="noninteractive")
    run(["apt-get", "install", "-y", "-q", "qemu-user-static", "binfmt-support", "debootstrap"],
        env=env, stdout=subprocess.DEVNULL)
    if not (BINFMT / "register").exists():
        run(["mount", "-t", "binfmt_misc", "binfmt_misc", str(BINFMT)])
    run(["update-binfmts", "--enable", "qemu-aarch64"])


def ensure_tools(allow_install: bool) -> None:
    missing = tools_missing()
    if missing and allow_install:
        install_tools()
        missing = tools_missing()
    if missing:
        raise CheckError(f"missing {', '.join(missing)}; as root: apt-get install qemu-user-static "
                         "binfmt-support debootstrap && update-binfmts --enable qemu-aarch64 "
                         "(or run this with --install-tools)")


# ---- the arm64 root -------------------------------------------------------------------

def build_root() -> float:
    """Seconds spent; 0 when the cached root is reused."""
    if (ROOT / READY).exists():
        have = set((ROOT / READY).read_text().split()[-1].split(","))
        lacking = [p for p in PACKAGES.split(",") if p not in have]
        log(f"reusing the arm64 root at {ROOT}" + (f"; adding {', '.join(lacking)}" if lacking else ""))
        if lacking:
            with Mounted():
                guest(f"apt-get update -q && apt-get install -y -q --no-install-recommends "
                      f"{' '.join(lacking)}", "apt", cwd="/")
            (ROOT / READY).write_text(f"{SUITE} arm64 {PACKAGES}\n")
        return 0.0
    tmp = ROOT.with_name(ROOT.name + ".tmp")
    shutil.rmtree(tmp, ignore_errors=True)
    tmp.parent.mkdir(parents=True, exist_ok=True)
    log(f"building a Debian {SUITE} arm64 root at {ROOT} (once; several minutes under emulation)")
    t0 = time.monotonic()
    with open(OUT / "debootstrap.log", "w") as f:
        run(["debootstrap", "--arch=arm64", "--variant=minbase", f"--include={PACKAGES}",
             SUITE, str(tmp), MIRROR], stdout=f, stderr=subprocess.STDOUT)
    (tmp / READY).write_text(f"{SUITE} arm64 {PACKAGES}\n")
    shutil.rmtree(ROOT, ignore_errors=True)
    tmp.rename(ROOT)
    return time.monotonic() - t0


class Mounted:
    """/proc and /dev inside the root for the duration of the checks. Not /sys: the host's
    x86 CPU topology there makes the arm build of onnxruntime's cpuinfo crash on import
    under emulation (seen here); without it cpuinfo warns and falls back, as it would not
    need to on a real board, which has its own /sys."""

    POINTS = (("proc", ["-t", "proc", "proc"]), ("dev", ["--bind", "/dev"]))

    def __enter__(self) -> "Mounted":
        self.done: list[Path] = []
        for name, args in self.POINTS:
            target = ROOT / name
            target.mkdir(exist_ok=True)
            if not os.path.ismount(target):
                run(["mount", *args, str(target)])
                self.done.append(target)
        shutil.copy("/etc/resolv.conf", ROOT / "etc" / "resolv.conf")
        # the host's trust store: where the network passes a proxy with its own certificate
        # authority, the guest's pip must trust what the host's does
        shutil.copy(HOST_CA, ROOT / GUEST_CA.lstrip("/"))
        return self

    def __exit__(self, *exc) -> None:
        for target in reversed(self.done):
            subprocess.run(["umount", "-l", str(target)], check=False)


def guest(script: str, log_name: str, timeout: float = 3600, cwd: str = GUEST_SRC) -> tuple[str, float]:
    """Run a shell script inside the root (a clean environment: no host pip settings).
    Returns its output and seconds; raises CheckError naming the step and its last lines."""
    env = {"PATH": "/usr/local/sbin:/usr/local/bin:/usr/sbin:/usr/bin:/sbin:/bin",
           "DEBIAN_FRONTEND": "noninteractive", "HOME": "/root", "LANG": "C.UTF-8",
           "OPENCV_LOG_LEVEL": "ERROR", "PIP_DISABLE_PIP_VERSION_CHECK": "1",
           "PIP_CERT": GUEST_CA, "SSL_CERT_FILE": GUEST_CA}
    t0 = time.monotonic()
    p = subprocess.run([shutil.which("chroot") or "/usr/sbin/chroot", str(ROOT), "/bin/sh", "-ec", f"cd {cwd}\n{script}"],
                       env=env, capture_output=True, text=True, timeout=timeout)
    seconds = time.monotonic() - t0
    text = p.stdout + p.stderr
    (OUT / f"{log_name}.log").write_text(text)
    if p.returncode != 0:
        tail = "\n".join(text.strip().splitlines()[-8:])
        raise CheckError(f"{log_name} failed in the arm64 root (exit {p.returncode}):\n{tail}")
    return text, seconds


def copy_checkout() -> None:
    """Tracked and untracked-but-not-ignored files, as a clone of the working tree would have;
    the guest's .venv survives between runs so that pip's downloads are made once."""
    dest = ROOT / GUEST_SRC.lstrip("/")
    files = subprocess.run(["git", "ls-files", "-co", "--exclude-standard", "-z"], cwd=REPO,
                           check=True, capture_output=True).stdout.decode().split("\0")
    if dest.exists():
        for child in dest.iterdir():
            if child.name != ".venv":
                shutil.rmtree(child) if child.is_dir() else child.unlink()
    for rel in filter(None, files):
        src = REPO / rel
        if src.is_file():
            (dest / rel).parent.mkdir(parents=True, exist_ok=True)
            shutil.copy2(src, dest / rel)
    out = ROOT / GUEST_OUT.lstrip("/")
    shutil.rmtree(out, ignore_errors=True)
    out.mkdir(parents=True)


# ---- the checks -----------------------------------------------------------------------

RSS = ("import resource, subprocess, sys; r = subprocess.run(sys.argv[1:]); "
       "print('peak_rss_kib', resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss); "
       "sys.exit(r.returncode)")

FACTS = """
import importlib.metadata as md, json, platform, sys
import onnxruntime as ort
from limner.bench.int8 import detect_types
print(json.dumps({"machine": platform.machine(), "python": platform.python_version(),
                  "onnxruntime": ort.__version__, "numpy": md.version("numpy"),
                  "opencv": md.version("opencv-python"), "int8_types": detect_types(),
                  "requires": md.requires("limner"),
                  "torch_importable": __import__("importlib.util").util.find_spec("torch") is not None}))
"""

IMPORT_CHECK = ("import sys, limner.runtime.cli, limner.runtime.live, limner.bench.run, "
                "limner.bench.int8_probe; "
                "assert 'torch' not in sys.modules, 'the runtime imported torch'; print('torch-free')")


def host_outputs() -> Path:
    ref = OUT / "x86_64.npz"
    run([sys.executable, "-m", "limner.bench.platform_outputs", "-o", str(ref)], cwd=REPO,
        stdout=subprocess.DEVNULL)
    return ref


def checks(ref: Path) -> dict:
    steps: dict[str, dict] = {}
    shutil.copy(ref, ROOT / GUEST_OUT.lstrip("/") / "x86_64.npz")
    py = ".venv/bin/python"

    _, s = guest("[ -x .venv/bin/python ] || python3 -m venv .venv\n.venv/bin/pip install -q .",
                 "install")
    steps["install"] = {"seconds": round(s, 1), "command": "python3 -m venv .venv && .venv/bin/pip install ."}
    text, s = guest(f"{py} -c \"{IMPORT_CHECK}\"", "import")
    steps["import"] = {"seconds": round(s, 1), "ok": "torch-free" in text}
    text, _ = guest(f"{py} - <<'EOF'\n{FACTS}\nEOF", "facts")
    facts = json.loads([l for l in text.splitlines() if l.startswith("{")][-1])

    live_out = f"{GUEST_OUT}/live.mp4"
    text, s = guest(f"{py} -c \"{RSS}\" .venv/bin/limner live --source demo --frames {LIVE_FRAMES} "
                    f"--headless --resolution 320x180 --output {live_out}", "live")
    rss = [int(l.split()[1]) for l in text.splitlines() if l.startswith("peak_rss_kib")]
    steps["live"] = {"seconds": round(s, 1), "peak_rss_mib": round(rss[-1] / 1024, 1) if rss else None,
                     "frames_written": _frames(ROOT / live_out.lstrip("/")),
                     "last_line": _last(text)}
    # the probe writes its test graphs with onnx: one extra package, as its error message says
    text, s = guest(".venv/bin/pip install -q onnx\n"
                    ".venv/bin/limner int8-probe --resolution 160x90 --layers 1 --channels 32 --threads 1", "int8-probe")
    steps["int8-probe"] = {"seconds": round(s, 1), "last_line": _last(text)}
    cands = " ".join(f"runtime/assets/candidates/ember/{c}" for c in CANDIDATES)
    # the reference is a small student, not the teacher: emulated float math is slow (about
    # 35 GMACs a teacher frame at 640x360), and this run only shows that the bench works there
    text, s = guest(f".venv/bin/limner bench {cands} --teacher runtime/assets/candidates/ember/"
                    f"{REFERENCE} --content runtime/assets/photos/heldout/chelsea.jpg "
                    f"--config configs/bench/board-smoke.toml -o {GUEST_OUT}/bench", "bench")
    steps["bench"] = {"seconds": round(s, 1), "last_line": _last(text)}
    _, s = guest(f"{py} -m limner.bench.platform_outputs --frame {GUEST_OUT}/x86_64.npz "
                 f"-o {GUEST_OUT}/aarch64.npz", "outputs")
    steps["outputs"] = {"seconds": round(s, 1)}
    shutil.copy(ROOT / GUEST_OUT.lstrip("/") / "aarch64.npz", OUT / "aarch64.npz")
    bench_json = ROOT / GUEST_OUT.lstrip("/") / "bench" / "report.json"
    if bench_json.exists():
        shutil.copy(bench_json, OUT / "bench-aarch64.json")
    return {"facts": facts, "steps": steps}


def _frames(path: Path) -> int:
    import cv2

    cap = cv2.VideoCapture(str(path))
    n = 0
    while cap.read()[0]:
        n += 1
    return n


def _last(text: str) -> str:
    """The step's own last line: not the RSS wrapper's, nor the cpuinfo warnings that
    onnxruntime prints under emulation (no /sys; see Mounted)."""
    lines = [l for l in text.strip().splitlines()
             if not l.startswith("peak_rss_kib") and "cpuinfo" not in l and "cpuid_info" not in l]
    return lines[-1] if lines else ""


def verdicts(ref: Path, facts: dict) -> dict:
    from limner.bench.platform_outputs import compare

    diffs = compare(ref, OUT / "aarch64.npz")
    requires = " ".join(facts["requires"] or [])
    return {
        "models": [d.__dict__ for d in diffs],
        # ONNX Runtime's quantize_static docstring and its quantization guide advise S8S8
        # (QDQ) on ARM64 (from memory of the documentation; bench/int8.py:detect_types).
        "int8_types_ok": facts["int8_types"] == "s8s8",
        "excluded_onnxruntime_ok": facts["onnxruntime"] != "1.21.0" and "!=1.21.0" in requires,
        "torch_absent_ok": not facts["torch_importable"],
    }


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--install-tools", action="store_true",
                    help="apt-get install qemu-user-static, binfmt-support and debootstrap if missing")
    a = ap.parse_args(argv)
    t0 = time.monotonic()
    OUT.mkdir(parents=True, exist_ok=True)
    try:
        ensure_tools(a.install_tools)
        built = build_root()
        copy_checkout()
        ref = host_outputs()
        with Mounted():
            found = checks(ref)
        v = verdicts(ref, found["facts"])
    except (CheckError, OSError, subprocess.CalledProcessError, subprocess.TimeoutExpired) as e:
        log(f"failed: {e}")
        return 2
    report = {"root": str(ROOT), "root_build_seconds": round(built, 1),
              "wall_seconds": round(time.monotonic() - t0, 1), **found, **v,
              "note": "emulated (qemu-user): timings say nothing about a real board's speed"}
    tmp = OUT / "report.json.tmp"
    tmp.write_text(json.dumps(report, indent=1))
    tmp.replace(OUT / "report.json")
    return summarise(report)


def summarise(r: dict) -> int:
    f = r["facts"]
    log(f"{f['machine']}: Python {f['python']}, onnxruntime {f['onnxruntime']}, numpy {f['numpy']}, "
        f"opencv-python {f['opencv']}; int8 types chosen: {f['int8_types']}")
    for name, s in r["steps"].items():
        extra = {k: v for k, v in s.items() if k not in ("seconds", "command")}
        log(f"  {name}: {s['seconds']} s emulated {extra if extra else ''}")
    log("largest |aarch64 - x86_64| output difference per bundled model (units of 255):")
    bad = 0
    for d in r["models"]:
        mark = "ok" if d["ok"] else "EXCEEDS"
        bad += not d["ok"]
        log(f"  {d['model']:28s} {d['precision']:5s} max {d['max_abs']:3d} (tolerance {d['tolerance']:3d}) "
            f"mean {d['mean_abs']:.3f}  {mark}")
    for k in ("int8_types_ok", "excluded_onnxruntime_ok", "torch_absent_ok"):
        bad += not r[k]
        log(f"  {k.removesuffix('_ok').replace('_', ' ')}: {'ok' if r[k] else 'FAILED'}")
    log(f"wall time {r['wall_seconds']} s (root build {r['root_build_seconds']} s); "
        f"{r['note']}; report: {OUT / 'report.json'}")
    return 1 if bad else 0


if __name__ == "__main__":
    sys.exit(main())
