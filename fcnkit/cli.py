"""Command-line interface: a thin argparse layer over the public API.

Every error caused by the user's input is printed as one line on stderr and exits with status 2. Ctrl-C
(SIGINT) and SIGTERM stop a command alike, cleaning up as it goes (training first writes a resume point): exit
status 130 for SIGINT, 143 for SIGTERM (128 + the signal's number). The options keep one meaning across
commands (docs/cli.md, "Conventions"): ``--out`` is where the results go (a folder for commands that write many
files, else a file whose suffix picks the format), ``--json`` prints the results as JSON instead of a table,
lists are written with commas, ``--max-pixels`` has one default, and help shows every default. Older spellings
still work, with a one-line note.
"""

from __future__ import annotations

import argparse
import atexit
import contextlib
import json
import os
import signal
import sys
import threading
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import NoReturn

from fcnkit.errors import FcnkitError, Interrupted


class _Help(argparse.HelpFormatter):
    """Help that states every option's default (argparse's own formatter of that kind also prints None/False)."""

    def _get_help_string(self, action: argparse.Action) -> str | None:
        text = action.help or ""
        shown = action.default not in (None, False, [], argparse.SUPPRESS)
        if action.option_strings and shown and "default" not in text:
            text += " (default: %(default)s)"
        return text


class _Parser(argparse.ArgumentParser):
    def __init__(self, *args: object, **kwargs: object) -> None:
        kwargs.setdefault("formatter_class", _Help)
        super().__init__(*args, **kwargs)  # type: ignore[arg-type]

    def error(self, message: str) -> None:  # one line, exit 2 (argparse's default prints usage too)
        sys.stderr.write(f"{self.prog}: error: {message}\n")
        raise SystemExit(2)


def _note(text: str) -> None:
    """A one-line remark on what a command chose to do (stderr, so standard output stays the results)."""
    sys.stderr.write(f"fcnkit: note: {text}\n")


class _Renamed(argparse.Action):
    """An option's older spelling: stored under the new option's name, with a one-line note."""

    def __init__(self, option_strings: list[str], dest: str, new: str, **kwargs: object) -> None:
        self.new = new
        super().__init__(option_strings, dest, help=argparse.SUPPRESS, **kwargs)  # type: ignore[arg-type]

    def __call__(self, parser: argparse.ArgumentParser, namespace: argparse.Namespace, values: object,
                 option_string: str | None = None) -> None:
        _note(f"{option_string} is now spelled {self.new}; read as such")
        setattr(namespace, self.dest, values)


class _List(argparse.Action):
    """A comma-separated list; the older space-separated form (several values) is read too, with a note."""

    def __call__(self, parser: argparse.ArgumentParser, namespace: argparse.Namespace, values: object,
                 option_string: str | None = None) -> None:
        parts = list(values) if isinstance(values, list) else [values]
        if len(parts) > 1:
            joined = ",".join(",".join(map(str, p)) for p in parts)
            _note(f"{option_string}: lists are written with commas ({option_string} {joined}); read as such")
        setattr(namespace, self.dest, [v for part in parts for v in part])


def _list_option(p: argparse.ArgumentParser, name: str, cast: Callable[[str], object], what: str,
                 **kwargs: object) -> None:
    p.add_argument(name, type=_csv(cast, what), nargs="+", action=_List, **kwargs)  # type: ignore[arg-type]


def _csv(cast: Callable[[str], object], what: str) -> Callable[[str], list]:
    """An argparse type for comma-separated values."""
    def parse(text: str) -> list:
        try:
            return [cast(v) for v in text.split(",") if v != ""]
        except ValueError:
            raise argparse.ArgumentTypeError(f"{text!r} is not a comma-separated list of {what}") from None
    return parse


def _max_pixels_option(p: argparse.ArgumentParser) -> None:
    from fcnkit.data.raster import DEFAULT_MAX_PIXELS

    p.add_argument("--max-pixels", type=int, default=DEFAULT_MAX_PIXELS, metavar="N",
                   help="refuse images with more pixels than this (a guard against mistaken or hostile files)")


def _overwrite_option(p: argparse.ArgumentParser) -> None:
    p.add_argument("--overwrite", action="store_true", help="replace results an earlier run left at --out "
                   "(without it an existing result is never replaced; inputs and weights never are)")


def _describe(args: argparse.Namespace) -> int:
    from fcnkit.config import load_config  # not `from fcnkit import describe`: an imported submodule
    from fcnkit.describe import describe, format_description  # of that name would shadow the function

    for i, path in enumerate(args.configs):
        d = describe(load_config(path, note=_note))
        if args.json:
            print(json.dumps({"config": path, **d}))
        else:
            print(("\n" if i else "") + f"== {path}\n" + format_description(d))
    return 0


def _add_describe(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("describe", help="print a net's stride, receptive field, tile margin, size and cost")
    p.add_argument("configs", nargs="+", metavar="CONFIG", help="TOML config file(s)")
    p.add_argument("--json", action="store_true", help="print one JSON object per config instead of a table")
    p.set_defaults(run=_describe)


def _export(args: argparse.Namespace) -> int:
    from fcnkit.model import Model

    print(Model.load(args.model).export(args.out, args.format, overwrite=args.overwrite).summary())
    return 0


def _add_export(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("export", help="write a model file as ONNX or TorchScript (any height and width), checked")
    p.add_argument("model", metavar="MODEL", help="model file (.safetensors) written by fcnkit")
    p.add_argument("--format", choices=("onnx", "torchscript"), default="onnx", help="output format ")
    p.add_argument("--out", required=True, metavar="FILE", help="where to write the exported net")
    _overwrite_option(p)
    p.set_defaults(run=_export)


def _train(args: argparse.Namespace) -> int:
    import math

    from fcnkit.config import config_to_dict, load_config
    from fcnkit.model import Model

    cfg = load_config(args.config, note=_note)
    model = Model.build(cfg) if args.init is None else Model.load(args.init)  # --init: that net, trained further
    settings = {**config_to_dict(cfg)["train"], **{k: v for k, v in (("epochs", args.epochs), ("seconds", args.seconds),
                                                                      ("threads", args.threads)) if v is not None}}
    model.fit(args.data, out_dir=args.out, resume=args.resume, progress=not args.quiet, max_pixels=args.max_pixels,
              note=_note, **settings)
    r = model.last_run
    if os.environ.get("RANK", "0") == "0":  # under torchrun, one summary
        best = "no validation images, model of the last epoch kept" if math.isnan(r.best_mean_iou) else \
            f"best validation mean IoU {r.best_mean_iou:.4f} at epoch {r.best_epoch}"
        stop = ", stopped early" if r.stopped_early else ", out of time (train.seconds)" if r.out_of_time else ""
        print(f"{r.epochs} epochs{stop}; {best}; model: {r.model_path}; metrics: {r.run_dir / 'metrics.csv'}")
    return 0


def _add_train(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("train", help="train a net on a dataset folder (resumable); keeps the best model by "
                       "validation mean IoU")
    p.add_argument("config", metavar="CONFIG", help="TOML config file ([model] and [train] tables), or the name of "
                   "a shipped config (tiny, demo, fcn8s, fcn32s, unet)")
    p.add_argument("--data", required=True, metavar="DIR", help="dataset folder (images/, masks/, classes.toml)")
    p.add_argument("--out", required=True, metavar="RUN_DIR", help="run folder: model, resume point, metrics.csv")
    p.add_argument("--resume", action="store_true", help="continue the run in RUN_DIR exactly where it stopped")
    p.add_argument("--init", metavar="MODEL", help="start from this model file (its net replaces [model])")
    p.add_argument("--epochs", type=int, metavar="N", help="override train.epochs")
    p.add_argument("--seconds", type=float, metavar="S",
                   help="override train.seconds: wall-time budget that sets the run's length in place of the "
                        "epochs; stops in time to validate, keep the best model and calibrate it")
    p.add_argument("--threads", type=int, metavar="N",
                   help="override train.threads (0 = as many as other programs leave cores free, up to torch's "
                        "default)")
    _max_pixels_option(p)
    p.add_argument("--quiet", action="store_true", help="no progress bars")
    p.set_defaults(run=_train)


def add_tile_options(p: argparse.ArgumentParser) -> None:
    """Options of tiled inference shared by the commands that run it."""
    p.add_argument("--scan", choices=("auto", "rows", "whole", "tiles"), default="auto",
                   help="rows: exact, full-width bands of rows, each layer computed once; whole: the whole image in "
                   "one pass (exact); tiles: overlapping tiles, blended (any net, flip TTA, other engines); auto "
                   "(default): rows when the net allows, else whole when the image fits in memory, else tiles")
    p.add_argument("--tile", type=int, metavar="PX", help="tile side in pixels (default: 512)")
    p.add_argument("--overlap", type=int, metavar="PX", help="tile overlap (default: from the net's receptive field)")
    p.add_argument("--batch", type=int, metavar="N",
                   help="tiles per forward pass (default: as many as make about a quarter megapixel)")
    p.add_argument("--window", choices=("hann", "linear", "none"),
                   help="blending window over tile overlaps (default: hann)")
    p.add_argument("--exact", action="store_true", help="results must equal whole-image inference: rows, a whole "
                   "pass or exact tiles, and an error instead of any scan that is not exact (rows and whole "
                   "passes are always exact)")
    p.add_argument("--tta", action="store_true", help="average over horizontal and vertical flips (not exact)")
    p.add_argument("--engine", choices=("torch", "onnxruntime"), default="torch",
                   help="runtime of the forward pass (onnxruntime: optional extra fcnkit[onnx])")
    _max_pixels_option(p)


def _evaluate(args: argparse.Namespace) -> int:
    from fcnkit.evaluate import evaluate

    if isinstance(args.json, str):  # the older `--json FILE`
        _note("--json FILE is now spelled --out FILE (--json alone prints the scores as JSON); read as such")
        args.out, args.json = args.json, False
    r = evaluate(args.model, args.data, json_path=args.out, report=args.report, curves=args.curves,
                 overwrite=args.overwrite,
                 examples=args.examples, scan=args.scan, tile=args.tile, overlap=args.overlap, batch=args.batch,
                 window=args.window, exact=args.exact, tta=args.tta, engine=args.engine,
                 max_pixels=args.max_pixels, progress=not args.quiet, note=_note)
    print(json.dumps(r.to_dict()) if args.json else r.table())
    for what, path in r.paths.items():
        _wrote(what, path)
    return 0


def _wrote(what: str, path: object) -> None:
    """Where a result went, on stderr (standard output stays the results)."""
    sys.stderr.write(f"fcnkit: wrote {what}: {path}\n")


def _add_evaluate(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("evaluate", help="score a model on a labelled folder; JSON scores and an HTML report")
    p.add_argument("model", metavar="MODEL", help="model file (.safetensors) written by fcnkit")
    p.add_argument("--data", required=True, metavar="DIR", help="labelled folder (images/, masks/, classes.toml)")
    p.add_argument("--out", metavar="FILE", help="write the scores here as JSON (without it nothing is written)")
    p.add_argument("--json", nargs="?", const=True, default=False, metavar="",
                   help="print the scores as one JSON object instead of a table")
    p.add_argument("--report", metavar="FILE", help="also write a self-contained HTML report here")
    p.add_argument("--curves", metavar="CSV", help="training metrics for the report (default: metrics.csv beside "
                   "the model file, if any)")
    p.add_argument("--examples", type=int, default=3, metavar="N", help="worst-scoring images shown in the report")
    add_tile_options(p)
    p.add_argument("--quiet", action="store_true", help="no progress bars")
    _overwrite_option(p)
    p.set_defaults(run=_evaluate)


def _segment(args: argparse.Namespace) -> int:
    from fcnkit.inference.segment import segment_images

    segment_images(args.model, args.inputs, args.out, scan=args.scan, tile=args.tile, overlap=args.overlap,
                   batch=args.batch, window=args.window, exact=args.exact, tta=args.tta, engine=args.engine,
                   bf16=args.bf16, pixel_size=args.pixel_size, max_pixels=args.max_pixels, preview=args.preview,
                   progress=not args.quiet, echo=print, note=_note, outputs=_output_options(args),
                   overwrite=args.overwrite)
    return 0


def _output_options(args: argparse.Namespace) -> object:
    from fcnkit.outputs import OutputOptions

    return OutputOptions(cog=not args.no_cog, polygons=args.polygons, min_area_m2=args.min_area,
                         simplify=args.simplify)


def _add_segment(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("segment", help="map images of any size: labels, confidence, uncertainty, overlay, areas")
    p.add_argument("model", metavar="MODEL", help="model file (.safetensors) written by fcnkit")
    p.add_argument("inputs", nargs="+", metavar="INPUT", help="image files (PNG, JPEG, TIFF/BigTIFF) or folders")
    p.add_argument("--out", required=True, metavar="DIR", help="output folder (created if missing)")
    add_tile_options(p)
    p.add_argument("--bf16", action="store_true", help="bfloat16 forward pass (faster on CPUs with AMX/AVX-512 BF16)")
    p.add_argument("--pixel-size", type=float, metavar="M",
                   help="pixel side in metres, for areas (default: from the image's CRS and transform, if any)")
    p.add_argument("--preview", type=int, default=1024, metavar="PX",
                   help="longest side of the preview card's overview")
    p.add_argument("--polygons", nargs="?", const="gpkg", choices=("gpkg", "geojson"),
                   help="also write class polygons (id, name, area m², mean confidence): GeoPackage (default) or "
                   "GeoJSON")
    p.add_argument("--min-area", type=float, default=0.0, metavar="M2",
                   help="leave out polygons smaller than this many square metres (default: keep all)")
    p.add_argument("--simplify", type=float, default=0.0, metavar="PX",
                   help="simplify polygon outlines within this many pixels (default: exact pixel edges)")
    p.add_argument("--no-cog", action="store_true",
                   help="write plain tiled GeoTIFFs instead of Cloud-Optimised GeoTIFFs with overviews")
    p.add_argument("--quiet", action="store_true", help="no progress bars")
    _overwrite_option(p)
    p.set_defaults(run=_segment)


def _demo(args: argparse.Namespace) -> int:
    from fcnkit.demo import run_demo

    run_demo(args.out, quick=args.quick, progress=not args.quiet, overwrite=args.overwrite)
    return 0


def _add_demo(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("demo", help="synthetic scenes -> training -> evaluation report -> mapping a large mosaic")
    p.add_argument("--out", default="fcnkit-demo", metavar="DIR", help="output folder")
    p.add_argument("--quick", action="store_true", help="toy sizes: the same steps in seconds")
    p.add_argument("--quiet", action="store_true", help="no progress bars")
    _overwrite_option(p)
    p.set_defaults(run=_demo)


def _convert(args: argparse.Namespace) -> int:
    from fcnkit.convert import convert_classifier, grow_segmenter, load_classifier
    from fcnkit.data.classes import load_classes
    from fcnkit.model import Model

    if args.grow and args.out is None:
        raise FcnkitError("--grow: give --out MODEL for the segmenter's model file")
    if args.out is not None:  # before minutes of conversion, not after
        from fcnkit.destinations import check_outputs

        source = args.source if Path(args.source).is_file() else None
        check_outputs([args.out], inputs=[source, args.weights, args.classes], overwrite=args.overwrite)
    table = load_classes(args.classes) if args.classes else None
    src = load_classifier(args.source, args.weights, random_weights=args.random_weights)
    conv = convert_classifier(src.module, args.native, global_pool=args.pool, sizes=tuple(args.sizes),
                              keep=None if args.grow else args.keep)
    cert = conv.certificate
    if args.json:
        print(json.dumps({"source": args.source, **cert.to_dict()}))
    else:
        print(f"== {args.source} at {args.native} px\n{cert.format()}")
    if args.out is None:
        return 0
    if args.grow:
        conv = grow_segmenter(src.module, args.native, classes=table.num_classes if table and not args.keep else None,
                              keep=args.keep, skips=tuple(args.skips), bands=args.bands, global_pool=args.pool)
    model = Model.from_conversion(conv, source=src.source, classes=table, mean=args.mean, std=args.std)
    if args.grow:
        model.extra["certificate"] = cert.to_dict()
    model.save(args.out)
    what = "segmenter" if args.grow else "dense classifier"
    _wrote(f"model ({what}: {model.bands} bands, {model.num_classes} classes)", args.out)
    return 0


def _add_convert(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("convert", help="turn a classifier's dense head into convolutions, check it, grow a segmenter")
    p.add_argument("source", metavar="SOURCE",
                   help="torchvision architecture name (e.g. vgg11), TorchScript file, or package.module:factory")
    p.add_argument("--native", type=int, required=True, metavar="PX", help="input side the classifier was trained at")
    p.add_argument("--weights", metavar="FILE", help="state dict (.safetensors, or torch file read weights-only)")
    p.add_argument("--random-weights", action="store_true", help="torchvision architecture with random weights")
    p.add_argument("--pool", choices=("auto", "cam", "window"), default="auto",
                   help="what a global pool becomes: auto, cam (commuted with an affine head) or window (sliding)")
    _list_option(p, "--sizes", int, "whole numbers", default=[], metavar="PX,PX,...",
                 help="also state the output size for these input sides")
    p.add_argument("--out", metavar="MODEL", help="write a model file (dense classifier, or segmenter with --grow)")
    p.add_argument("--save", dest="out", action=_Renamed, new="--out")
    p.add_argument("--keep", type=_csv(int, "whole numbers"), metavar="I,J,...",
                   help="classifier outputs kept as classes")
    p.add_argument("--grow", action="store_true", help="grow a trainable segmenter (FCN recipe) instead")
    p.add_argument("--classes", metavar="TOML", help="class table (classes.toml) of the model file's classes")
    _list_option(p, "--skips", int, "whole numbers", default=[], metavar="STRIDE,STRIDE,...",
                 help="with --grow: trunk strides whose scores are fused, e.g. 16,8 (FCN-8s)")
    p.add_argument("--bands", type=int, metavar="N", help="with --grow: input bands (extra ones widen the first conv)")
    p.add_argument("--mean", type=_csv(float, "numbers"), metavar="M1,M2,...", help="per-band mean in raw pixel units")
    p.add_argument("--std", type=_csv(float, "numbers"), metavar="S1,S2,...", help="per-band std in raw pixel units")
    p.add_argument("--json", action="store_true", help="print the certificate as one JSON object")
    _overwrite_option(p)
    p.set_defaults(run=_convert)


def _check(args: argparse.Namespace) -> int:
    from fcnkit import check_dataset
    from fcnkit.data.dataset import format_check

    report = check_dataset(args.data_dir, max_pixels=args.max_pixels)
    print(format_check(report))
    return 0 if report.ok else 2


def _add_check(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("check", help="validate a dataset folder: sizes, bands, class pixel counts, every problem")
    p.add_argument("data_dir", metavar="DATA_DIR", help="folder with images/, masks/ and classes.toml")
    _max_pixels_option(p)
    p.set_defaults(run=_check)


def _scenes(args: argparse.Namespace) -> int:
    from fcnkit import make_scenes

    if args.out_dir is not None:  # the older positional OUT_DIR
        if args.out is not None:
            raise FcnkitError(f"give the output folder once: {args.out_dir} or --out {args.out}")
        _note("the output folder is now given as --out DIR; read as such")
        args.out = args.out_dir
    if args.out is None:
        raise FcnkitError("--out DIR: the folder to write the scenes into is missing")
    out = make_scenes(args.out, args.count, args.size, args.seed, nir=not args.no_nir, strokes=args.strokes)
    labels = f", {args.strokes} scribbled strokes per class" if args.strokes else ""
    _wrote(f"{args.count} synthetic Kessmoor scenes of {args.size}×{args.size} px "
           f"({'R, G, B' if args.no_nir else 'R, G, B, NIR'}{labels})", out)
    return 0


def _add_scenes(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("scenes", help="write synthetic aerial land-cover scenes as a dataset folder")
    p.add_argument("--out", metavar="DIR", help="new (or empty) folder to write (required)")
    p.add_argument("out_dir", nargs="?", help=argparse.SUPPRESS)
    p.add_argument("--count", type=int, default=16, metavar="N", help="number of scenes ")
    p.add_argument("--size", type=int, default=256, metavar="S", help="side of each scene in pixels ")
    p.add_argument("--seed", type=int, default=0, metavar="K", help="random seed; same seed, same scenes ")
    p.add_argument("--no-nir", action="store_true", help="RGB only (default: a fourth, near-infrared band)")
    p.add_argument("--strokes", type=int, metavar="N",
                   help="sparse labels: keep N short scribbled strokes per class in each mask, the rest unlabelled")
    p.set_defaults(run=_scenes)


def _sample(args: argparse.Namespace) -> int:
    from fcnkit.data.classes import load_classes
    from fcnkit.sampling import draw_sample

    expected = args.expected_accuracy[0] if len(args.expected_accuracy) == 1 else args.expected_accuracy
    s = draw_sample(args.labels, args.out, classes=load_classes(args.classes) if args.classes else None,
                    overwrite=args.overwrite,
                    total=args.points, target_se=args.target_se, expected_accuracy=expected,
                    minimum=args.min_per_class, seed=args.seed, image=args.image, chips=args.chips,
                    chip_size=args.chip_size, max_pixels=args.max_pixels)
    print(s.summary())
    for what, path in s.paths.items():
        _wrote(what, path)
    print("next: fill in the 'reference' field of every point (class name or id), then run fcnkit assess")
    return 0


def _add_sample(sub: argparse._SubParsersAction) -> None:
    from fcnkit.sampling import DEFAULT_EXPECTED_ACCURACY, DEFAULT_MINIMUM, DEFAULT_TARGET_SE

    p = sub.add_parser("sample", help="draw a stratified random sample of points from a label map, for reference "
                       "labelling and an accuracy and area assessment")
    p.add_argument("labels", metavar="LABELS", help="label map (GeoTIFF/TIFF or PNG of class ids)")
    _list_option(p, "--out", str, "file names", required=True, metavar="FILE,FILE,...",
                 help="sample file(s) to write, format from the suffix: .gpkg (GeoPackage), .geojson or .csv")
    p.add_argument("--classes", metavar="TOML", help="class table (classes.toml): class names and ignore value")
    size = p.add_mutually_exclusive_group()
    size.add_argument("--points", type=int, metavar="N", help="total number of points (default: planned from "
                      "--target-se)")
    size.add_argument("--target-se", type=float, default=DEFAULT_TARGET_SE, metavar="SE",
                      help=f"standard error wanted for overall accuracy; sets the number of points "
                      f"(default {DEFAULT_TARGET_SE})")
    p.add_argument("--expected-accuracy", type=_csv(float, "numbers"), default=[DEFAULT_EXPECTED_ACCURACY],
                   metavar="U or U1,U2,...", help="anticipated user's accuracy, one for all classes or one per "
                   f"class, for planning the number of points (default {DEFAULT_EXPECTED_ACCURACY})")
    p.add_argument("--min-per-class", type=int, default=DEFAULT_MINIMUM, metavar="N",
                   help=f"points per class at least; the rest in proportion to mapped area (default {DEFAULT_MINIMUM})")
    p.add_argument("--seed", type=int, default=0, metavar="K", help="random seed; same seed, same points ")
    p.add_argument("--image", metavar="IMAGE", help="the mapped image, for --chips")
    p.add_argument("--chips", metavar="DIR", help="also write one PNG of the image around each point into DIR")
    p.add_argument("--chip-size", type=int, default=64, metavar="PX", help="side of the image chips")
    _max_pixels_option(p)
    _overwrite_option(p)
    p.set_defaults(run=_sample)


def _assess(args: argparse.Namespace) -> int:
    from fcnkit.data.classes import load_classes
    from fcnkit.destinations import check_outputs
    from fcnkit.sampling import assess_sample, format_assessment

    if args.pixel_size is not None and not args.pixel_size > 0:
        raise FcnkitError(f"--pixel-size {args.pixel_size} (expected a positive number of metres)")
    by_suffix: dict[str, str] = {}
    for name in args.out:
        suffix = Path(name).suffix.lower()
        if suffix not in (".json", ".csv") or suffix in by_suffix:
            raise FcnkitError(f"--out {name}: expected one .json and/or one .csv file")
        by_suffix[suffix] = name
    check_outputs([*args.out, *([args.report] if args.report else [])],  # before the work, not after
                  inputs=[args.sample, args.labels, args.counts, args.classes], overwrite=args.overwrite)
    table = assess_sample(args.sample, labels=args.labels, counts=args.counts, overwrite=args.overwrite,
                          classes=load_classes(args.classes) if args.classes else None,
                          pixel_area_m2=args.pixel_size ** 2 if args.pixel_size is not None else None,
                          reference_field=args.reference_field, json_path=by_suffix.get(".json"),
                          csv_path=by_suffix.get(".csv"), max_pixels=args.max_pixels)
    if args.json:
        from fcnkit.report import json_safe

        print(json.dumps(json_safe(table)))
    else:
        print(format_assessment(table))
    for name in args.out:
        _wrote(Path(name).suffix.lower()[1:], name)
    if args.report:
        from fcnkit.report import write_assessment_report

        facts = {"sample": str(args.sample), "map": str(args.labels or args.counts)}
        _wrote("report", write_assessment_report(args.report, table, facts=facts))
    return 0


def _add_assess(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("assess", help="accuracy and area with 95 %% intervals from a filled reference sample "
                       "(stratified estimators of Olofsson et al. 2014)")
    p.add_argument("sample", metavar="SAMPLE", help="filled sample file (.gpkg, .geojson or .csv) from fcnkit sample")
    mapped = p.add_mutually_exclusive_group(required=True)
    mapped.add_argument("--labels", metavar="LABELS", help="the label map the sample was drawn from")
    mapped.add_argument("--counts", metavar="FILE",
                        help="instead of the map: its pixels per class (CSV or JSON with id and pixels)")
    p.add_argument("--classes", metavar="TOML", help="class table (classes.toml): class names and ignore value")
    p.add_argument("--pixel-size", type=float, metavar="M",
                   help="pixel side in metres, for areas (default: from the GeoTIFF's transform or the counts file)")
    p.add_argument("--reference-field", default="reference", metavar="NAME",
                   help="field holding the reference class of each point")
    _list_option(p, "--out", str, "file names", default=[], metavar="FILE,FILE,...",
                 help="write the estimates here, format from the suffix: .json and/or .csv (tidy table); "
                 "without it nothing is written")
    p.add_argument("--json", action="store_true", help="print the estimates as one JSON object instead of a table")
    p.add_argument("--report", metavar="FILE", help="also write a self-contained HTML report of the estimates")
    _max_pixels_option(p)
    _overwrite_option(p)
    p.set_defaults(run=_assess)


COMMANDS: list[Callable[[argparse._SubParsersAction], None]] = [
    _add_describe, _add_export, _add_train, _add_evaluate, _add_demo, _add_convert, _add_segment,
    _add_check, _add_scenes, _add_sample, _add_assess,
]


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="fcnkit", description="Fully convolutional segmentation nets on the CPU.")
    from fcnkit import __version__

    parser.add_argument("--version", action="version", version=f"fcnkit {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True
    for add in COMMANDS:
        add(sub)
    return parser


def _terminate(signum: int, frame: object) -> None:
    raise Interrupted("terminated", signum)


@contextlib.contextmanager
def _signals() -> Iterator[None]:
    """SIGTERM stops a command as Ctrl-C does (each command cleans up as it goes; training writes a resume
    point), and text that the terminal's encoding cannot show — file names that are not UTF-8 — is printed
    as escapes instead of failing the command."""
    from fcnkit.atomic import ESCAPES

    previous = None
    if threading.current_thread() is threading.main_thread():
        previous = signal.signal(signal.SIGTERM, _terminate)
    for stream in (sys.stdout, sys.stderr):
        if hasattr(stream, "reconfigure") and getattr(stream, "errors", ESCAPES) == "strict":
            stream.reconfigure(errors=ESCAPES)
    try:
        yield
    finally:
        if previous is not None:
            signal.signal(signal.SIGTERM, previous)


def run() -> NoReturn:
    """The ``fcnkit`` program: :func:`main`, then the exit. Python's teardown (freeing every module and object,
    then torch's libraries' own) took 0.3 s of a 3 s ``segment`` once torch was loaded (measured on 2 cores),
    and frees nothing the operating system does not free anyway. So when nothing else is running (no other
    thread that is not a daemon, no child process), the exit handlers run, the standard streams are flushed and
    the process ends at once; otherwise it exits as usual. Every output is closed and in place by then."""
    code = main()
    children = "multiprocessing" in sys.modules and sys.modules["multiprocessing"].active_children()
    others = [t for t in threading.enumerate() if t is not threading.main_thread() and not t.daemon]
    if children or others:
        raise SystemExit(code)
    atexit._run_exitfuncs()  # registered clean-ups (temporary folders' finalizers, logging) still run
    for stream in (sys.stdout, sys.stderr):
        with contextlib.suppress(Exception):  # a closed or broken stream cannot take the exit's last bytes
            stream.flush()
    with contextlib.suppress(Exception):  # and what C libraries wrote into the C library's own buffers
        import ctypes

        ctypes.CDLL(None).fflush(None)
    os._exit(code)


def main(argv: Sequence[str] | None = None) -> int:
    from fcnkit.allocator import reuse_freed_memory

    reuse_freed_memory()  # before any thread allocates (see fcnkit.allocator)
    args = build_parser().parse_args(argv)
    try:
        with _signals():
            return int(args.run(args) or 0)
    except FcnkitError as e:
        message = " ".join(str(e).splitlines())  # always one line, whatever the message holds
        sys.stderr.write(f"fcnkit {args.command}: error: {message}\n")
        return 2
    except OSError as e:
        where = f"{e.filename}: " if getattr(e, "filename", None) else ""
        sys.stderr.write(f"fcnkit {args.command}: error: {where}{e.strerror or e}\n")
        return 2
    except KeyboardInterrupt as e:  # the message, when there is one, says what was saved
        sys.stderr.write(f"fcnkit {args.command}: {str(e) or 'interrupted'}\n")
        return 128 + getattr(e, "signum", signal.SIGINT)  # 130 for Ctrl-C, 143 for SIGTERM
