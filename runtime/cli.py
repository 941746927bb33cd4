"""The `limner` command. Parses arguments only; each subcommand calls a library function.

Subcommand modules are imported lazily, so `limner live`, `bench` and `pick` never
load torch (a single-board computer runs them without it).
"""
from __future__ import annotations

import argparse
import os
import signal
import sys
import threading
from pathlib import Path
from typing import Callable

from .errors import InputError

# OpenCV's and FFmpeg's own console warnings ("moov atom not found", "global cap_v4l.cpp ...")
# would reach the operator beside Limner's one-line messages; keep only their errors. Set
# before cv2 is first imported (the subcommands import it lazily); an operator's own
# setting wins.
os.environ.setdefault("OPENCV_LOG_LEVEL", "ERROR")
os.environ.setdefault("OPENCV_FFMPEG_LOGLEVEL", "-8")  # AV_LOG_QUIET



def _add_train(p: argparse.ArgumentParser) -> None:
    p.add_argument("style", metavar="STYLE",
                   help="a bundled style name (ember, tidepool, woodcut) or a style image path")
    p.add_argument("--content", nargs="+", required=True, metavar="PATH",
                   help="image folders, images, videos, or scenes:N (procedural scenes)")
    p.add_argument("-o", "--out", required=True, type=Path, metavar="OUT",
                   help="run folder: checkpoint, previews, loss log, config, teacher.onnx")
    p.add_argument("--config", type=Path, help="TOML training config (configs/train/*.toml)")
    p.add_argument("--resume", action="store_true", help="continue from OUT/checkpoint.pt")
    p.add_argument("--preview", nargs="+", metavar="PATH",
                   help="held-out images shown in the previews (default: first content images)")
    for flag, tp, mv, hlp in (("--steps", int, "N", "training steps"),
                              ("--size", int, "PX", "side of the square training crops, in pixels"),
                              ("--batch", int, "N", "batch size"), ("--lr", float, "LR", "Adam learning rate"),
                              ("--style-weight", float, "W", "style strength"),
                              ("--content-weight", float, "W", "content weight"),
                              ("--seed", int, "N", "random seed"), ("--threads", int, "N", "torch threads")):
        p.add_argument(flag, type=tp, metavar=mv, help=hlp + " (overrides the config)")
    p.add_argument("--loss-net", choices=["hed", "vgg16-keras", "vgg16", "random"],
                   help="hed: HED's VGG-16 trunk (default; `make loss-weights` fetches it); vgg16-keras: "
                        "a Keras VGG-16 .h5 file; vgg16: a PyTorch state dict (file, hub cache or "
                        "download); random: random-weight features (tests and experiments only)")
    p.add_argument("--init", metavar="CHECKPOINT",
                   help="start from this teacher checkpoint's weights (e.g. another style's teacher)")
    p.add_argument("--device", help="cpu (default), cuda, cuda:N or auto; under torchrun each rank "
                   "takes its own GPU")
    p.add_argument("--loss-weights", metavar="FILE",
                   help="the loss network's weight file (.h5 for hed / vgg16-keras, .pth for vgg16)")


def _run_train(a: argparse.Namespace) -> int:
    from limner.compress.distributed import shutdown, world_from_env
    from limner.compress.train import TrainConfig, TrainStopped, train
    from limner.runtime import config as cfgmod

    cfg = cfgmod.load(TrainConfig, a.config, {
        "steps": a.steps, "size": a.size, "batch": a.batch, "lr": a.lr,
        "style_weight": a.style_weight, "content_weight": a.content_weight, "seed": a.seed,
        "threads": a.threads, "loss_net": a.loss_net, "loss_weights": a.loss_weights,
        "init": a.init, "device": a.device})
    try:
        ckpt = train(a.style, a.content, a.out, cfg, resume=a.resume, preview_content=a.preview)
    except TrainStopped as e:
        if world_from_env().rank == 0:
            print(f"\n{e}", file=sys.stderr)
        return 130
    finally:
        shutdown()
    if world_from_env().rank == 0:
        print(f"checkpoint {ckpt}; model {a.out / 'teacher.onnx'}")
    return 0


def _add_export(p: argparse.ArgumentParser) -> None:
    p.add_argument("checkpoint", type=Path, metavar="CHECKPOINT",
                   help="a training or compression checkpoint (.pt)")
    p.add_argument("-o", "--out", required=True, type=Path, metavar="OUT",
                   help="the model file to write (.onnx)")


def _run_export(a: argparse.Namespace) -> int:
    from limner.compress.export import export

    print(export(a.checkpoint, a.out))
    return 0


def _add_live(p: argparse.ArgumentParser) -> None:
    from limner.runtime.live_options import add_arguments

    add_arguments(p)
    p.add_argument("--list-cameras", action="store_true", help="list cameras that open, then exit")


def _run_live(a: argparse.Namespace) -> int:
    if a.list_cameras:
        from limner.runtime.sources import list_cameras

        cams = list_cameras()
        print("\n".join(cams) if cams else "no cameras found")
        return 0
    from limner.runtime.live import run_live
    from limner.runtime.live_options import from_args

    stats = run_live(from_args(a))
    print(stats.line())
    return 0


def _add_capture(p: argparse.ArgumentParser) -> None:
    p.add_argument("--source", metavar="SRC",
                   help="camera index, /dev/videoN, video file, URL or 'demo' (default: camera 0, else demo)")
    p.add_argument("--frames", type=int, required=True, metavar="N", help="number of frames to save")
    p.add_argument("--every", type=int, default=1, metavar="K", help="keep every K-th frame (default 1)")
    p.add_argument("-o", "--out", type=Path, required=True, metavar="OUT",
                   help="folder for the frames (frame_NNNNNN.jpg; new frames are numbered on)")


def _run_capture(a: argparse.Namespace) -> int:
    from limner.runtime.capture import capture

    written = capture(a.source, a.frames, a.out, a.every)
    print(f"wrote {len(written)} frame(s) to {a.out}")
    return 0 if written else 1


def _add_compress(p: argparse.ArgumentParser) -> None:
    p.add_argument("teacher", metavar="TEACHER", help="a Limner teacher checkpoint (.pt) or model (.onnx)")
    p.add_argument("--content", nargs="+", required=True, metavar="PATH",
                   help="image folders, images, videos, scenes:N; split by source into "
                        "distillation, calibration and held-out sets")
    p.add_argument("--calibration", nargs="+", metavar="PATH",
                   help="content for int8 calibration only (then --content is all distillation)")
    p.add_argument("--recipe", type=Path, help="TOML recipe (default: configs/compress/default.toml)")
    p.add_argument("-o", "--out", type=Path, required=True, metavar="OUT",
                   help="candidates folder: models, manifest.json, recipe.toml, log, work/")


def _run_compress(a: argparse.Namespace) -> int:
    from limner.compress.distributed import shutdown, world_from_env
    from limner.compress.pipeline import compress
    from limner.compress.recipe import Recipe
    from limner.runtime import config as cfgmod

    recipe = cfgmod.load(Recipe, a.recipe or _default_recipe())
    main = world_from_env().rank == 0
    try:
        manifest = compress(a.teacher, a.content, recipe, a.out, calibration=a.calibration)
    except KeyboardInterrupt as e:
        if main:
            print(f"\ninterrupted; the current candidate's checkpoint is saved under {a.out / 'work'}. "
                  "Run the same command again to continue.", file=sys.stderr)
        return _stop_code(e)
    finally:
        shutdown()
    if main:
        print(f"{len(manifest['candidates'])} candidate(s); manifest {a.out / 'manifest.json'}")
    return 0


def _default_recipe() -> Path:
    here = Path(__file__).resolve().parents[1] / "configs" / "compress" / "default.toml"
    if here.is_file():
        return here
    raise InputError("no --recipe given and configs/compress/default.toml is not beside this install")


def _add_bench(p: argparse.ArgumentParser) -> None:
    p.add_argument("models", nargs="+", metavar="MODEL_OR_DIR", help="model files or folders of them")
    p.add_argument("--teacher", required=True, metavar="TEACHER",
                   help="the teacher model (quality reference)")
    p.add_argument("--content", nargs="+", required=True, metavar="PATH",
                   help="held-out images (never seen in training, distillation or calibration)")
    p.add_argument("--clip", metavar="VIDEO", help="clip for the warping error (default: the demo clip)")
    p.add_argument("--style", metavar="STYLE", help="style image for the style scores: a bundled style "
                   "name or an image (default: the teacher's style, when bundled)")
    p.add_argument("--config", type=Path, help="TOML bench config (configs/bench/default.toml)")
    p.add_argument("--resolutions", nargs="+", metavar="WxH", help="override the resolution ladder")
    p.add_argument("--threads", nargs="+", type=int, metavar="N", help="override thread counts (0: all)")
    p.add_argument("--frames", type=int, metavar="N", help="timed frames per measurement")
    p.add_argument("-o", "--out", required=True, type=Path, metavar="OUT",
                   help="report folder: report.md, .json, .csv, pareto.png, samples.png")


def _run_bench(a: argparse.Namespace) -> int:
    from limner.bench.config import BenchConfig
    from limner.bench.run import bench
    from limner.runtime import config as cfgmod

    overrides = {"resolutions": a.resolutions, "threads": a.threads, "frames": a.frames}
    if a.resolutions:  # the plot shows one of the resolutions asked for: 640x360 if there, else the first
        overrides["plot_resolution"] = "640x360" if "640x360" in a.resolutions else a.resolutions[0]
    cfg = cfgmod.load(BenchConfig, a.config, overrides)
    bench(a.models, a.teacher, a.content, a.out, cfg, clip=a.clip, style=a.style)
    print(f"report: {a.out / 'report.md'} (json, csv, pareto.png, samples.png beside it)")
    return 0


def _add_pick(p: argparse.ArgumentParser) -> None:
    from limner.bench.pick import AXES

    p.add_argument("report", metavar="REPORT", help="a bench report folder or its report.json")
    for axis in AXES.values():  # one flag per axis: fps, each quality metric, warp, style share
        p.add_argument(axis.flag, dest=axis.dest, metavar="V", help=axis.help)
    p.add_argument("--resolution", metavar="WxH", help="default: the report's plot resolution")


def _run_pick(a: argparse.Namespace) -> int:
    from limner.bench.pick import AXES, pick

    r = pick(a.report, resolution=a.resolution, **{x.dest: getattr(a, x.dest) for x in AXES.values()})
    if r.chosen is None:
        print("\n".join(r.lines), file=sys.stderr)
        return 1
    print("\n".join(r.lines))
    return 0


def _add_int8_probe(p: argparse.ArgumentParser) -> None:
    p.add_argument("--channels", type=int, default=64, metavar="C", help="channels in and out (default 64)")
    p.add_argument("--kernel", type=int, default=3, metavar="K", help="kernel side (default 3)")
    p.add_argument("--resolution", default="320x180", metavar="WxH", help="activation size (default: "
                   "640x360 at half resolution, where the students' bodies run)")
    p.add_argument("--layers", type=int, default=4, metavar="N", help="convolutions in the chain (default 4)")
    p.add_argument("--threads", type=int, default=0, metavar="N", help="0: one per core")
    p.add_argument("--types", default="auto", metavar="TYPES",
                   help="auto (from this CPU), u8s8, u8s8-reduced, s8s8")


def _run_int8_probe(a: argparse.Namespace) -> int:
    from limner.bench.int8_probe import ProbeSpec, probe
    from limner.runtime.images import parse_resolution

    w, h = parse_resolution(a.resolution)
    spec = ProbeSpec(channels=a.channels, kernel=a.kernel, height=h, width=w, layers=a.layers,
                     threads=a.threads, types=a.types)
    from limner.runtime.progress import Progress

    bar = Progress(spec.rounds, "int8 probe rounds", min_interval_s=0.0)
    r = probe(spec, progress=lambda i, n: bar.update(i - bar.n))
    bar.close()
    print(r.summary())
    print(f"{r.fused_int8_convs}/{spec.layers} convs run as int8 kernels (QLinearConv); "
          f"int8 output differs from fp32 by {r.rel_rms_error:.1%} RMS")
    if r.verdict():
        print(f"{r.verdict()}; consider [int8] enabled = false in the compress recipe.")
    return 0


Sub = tuple[str, Callable[[argparse.ArgumentParser], None], Callable[[argparse.Namespace], int] | None]
SUBCOMMANDS: list[Sub] = [
    ("train", _add_train, _run_train),
    ("export", _add_export, _run_export),
    ("compress", _add_compress, _run_compress),
    ("capture", _add_capture, _run_capture),
    ("bench", _add_bench, _run_bench),
    ("pick", _add_pick, _run_pick),
    ("int8-probe", _add_int8_probe, _run_int8_probe),
    ("live", _add_live, _run_live),
]
HELP = {
    "train": "train a teacher style network with perceptual losses",
    "export": "write a checkpoint as a self-contained ONNX model",
    "compress": "distill, prune and quantize a teacher into candidate models",
    "capture": "record venue frames for distillation and calibration",
    "bench": "measure fps and quality loss of models on this device",
    "pick": "choose the fastest model that meets quality thresholds",
    "int8-probe": "time fp32 against int8 convolutions: does int8 pay on this CPU?",
    "live": "stylise a camera, video or the demo clip in real time",
}


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="limner", description="Real-time style transfer for live "
                                "cameras: train, compress, benchmark, pick and run style networks.")
    p.add_argument("--version", action="version", version=_version())
    sub = p.add_subparsers(dest="command", metavar="COMMAND")
    for name, add, _ in SUBCOMMANDS:
        sp = sub.add_parser(name, help=HELP[name], description=HELP[name])
        add(sp)
    return p


def _version() -> str:
    """The installed package's version and the model format it reads and writes."""
    from importlib.metadata import PackageNotFoundError, version

    from limner.runtime.metadata import FORMAT_VERSION

    try:
        v = version("limner")
    except PackageNotFoundError:
        v = "(not installed)"
    return f"limner {v} (model format {FORMAT_VERSION})"


def _for_the_user(e: BaseException) -> bool:
    """An error whose message is one clear line for the user (runtime/errors.py): a value they
    gave, or their files and disk. Anything else is Limner's defect and keeps its traceback."""
    from limner.runtime.errors import InputError, is_user_os_error

    return isinstance(e, InputError) or is_user_os_error(e)


class Terminated(KeyboardInterrupt):
    """SIGTERM, raised where the program is, so that it ends as Ctrl-C does: work saved
    where a subcommand saves it, one line, no traceback (`limner live` stops its show
    cleanly on both instead)."""
    signum = signal.SIGTERM


def _on_term(signum: int, frame: object) -> None:
    raise Terminated()


def _stop_code(e: KeyboardInterrupt) -> int:
    """128 + the signal number, as a shell reports a process ended by it (130 Ctrl-C, 143 TERM)."""
    return 128 + int(getattr(e, "signum", signal.SIGINT))


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    a = parser.parse_args(argv)
    if a.command is None:
        parser.print_help()
        return 2
    run = {n: r for n, _, r in SUBCOMMANDS}[a.command]
    if threading.current_thread() is threading.main_thread():
        signal.signal(signal.SIGTERM, _on_term)
    try:
        return run(a)
    except ModuleNotFoundError as e:
        if e.name in ("torch", "onnx"):
            alone = " (or only it: pip install onnx)" if e.name == "onnx" else ""
            print(f"limner {a.command}: needs {e.name}; install the compress extra: "
                  f"pip install 'limner[compress]'{alone}", file=sys.stderr)
            return 2
        raise
    except KeyboardInterrupt as e:
        # subcommands that save work on Ctrl-C (train, compress) say how to continue first
        print(f"\nlimner {a.command}: interrupted", file=sys.stderr)
        return _stop_code(e)
    except Exception as e:
        if _for_the_user(e):
            print(f"limner {a.command}: error: {_one_line(e)}", file=sys.stderr)
            return 1
        raise
    finally:
        # the command is over: a signal while the interpreter shuts down (torch and
        # onnxruntime take a moment) would only turn a finished run into a killed one
        if threading.current_thread() is threading.main_thread():
            signal.signal(signal.SIGINT, signal.SIG_IGN)
            signal.signal(signal.SIGTERM, signal.SIG_IGN)


def _one_line(e: BaseException) -> str:
    """The message without errno markers: "[Errno 17] File exists: 'x'" -> "x: file exists"."""
    if isinstance(e, OSError) and e.strerror:
        where = f"{e.filename}: " if e.filename else ""
        return f"{where}{e.strerror[0].lower()}{e.strerror[1:]}"
    return str(e).strip().splitlines()[0] if str(e).strip() else type(e).__name__


if __name__ == "__main__":
    sys.exit(main())
