"""Write the demo's figures into README.md from a fresh `fcnkit demo` run, so the README never quotes stale numbers.

    python scripts/readme_figures.py              # run the full demo into fcnkit-demo/, then rewrite the block
    python scripts/readme_figures.py --from DIR   # use the figures.json of a demo run already in DIR
    python scripts/readme_figures.py --check      # exit 1 when README.md differs from the committed figures

The block between the two `demo-figures` markers of README.md is rendered from the run's `figures.json`, which is
copied to docs/demo-figures.json beside it; `--check` (run by the test suite) renders that copy again and compares.
"""

from __future__ import annotations

import argparse
import json
import shutil
import sys
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parent.parent
README = ROOT / "README.md"
FIGURES = ROOT / "docs" / "demo-figures.json"
BEGIN = "<!-- demo-figures: written by scripts/readme_figures.py from a fresh `fcnkit demo` run; do not edit -->"
END = "<!-- /demo-figures -->"


def _minutes(seconds: float) -> str:
    return f"{seconds // 60:.0f} min {seconds % 60:.0f} s"


def render(f: dict[str, Any]) -> str:
    """The README's figures block from a demo run's figures.json."""
    plan, test, mosaic, a = f["plan"], f["test"], f["mosaic"], f["assessment"]
    iv, cal = test["mean_iou_interval"], test["calibration"]
    px_ha = a["pixel_area_m2"] / 1e4
    o = a["overall_accuracy"]
    rows = [
        ("training", f"{plan['train_scenes']} scenes, {f['epochs']} epoch{'s' if f['epochs'] != 1 else ''}: "
                     f"best validation mean IoU {f['val_mean_iou']:.3f} at epoch {f['best_epoch']}"),
        ("held-out test scenes", f"{plan['test_scenes']} scenes: pixel accuracy {test['pixel_accuracy']:.3f}, mean IoU "
                                 f"{test['mean_iou']:.3f} (95 % bootstrap interval {iv['low']:.3f}–{iv['high']:.3f})"),
        ("calibration", f"temperature {cal['temperature']:.2f} fitted on the validation split; expected calibration "
                        f"error on the test scenes {cal['ece']:.4f} with it, {cal['ece_uncalibrated']:.4f} without"),
        ("mapped mosaic", f"{plan['mosaic_size']}×{plan['mosaic_size']} px against its true labels: pixel accuracy "
                          f"{mosaic['pixel_accuracy']:.3f}, mean IoU {mosaic['mean_iou']:.3f}; "
                          f"{f['pixels_per_second'] / 1e6:.2f} Mpx/s including every output"),
        ("reference sample", f"{a['sample_points']} points: overall accuracy {o['estimate']:.3f} ± "
                             f"{1.96 * o['se']:.3f} (95 %)"),
    ]
    for c, true in zip(a["classes"], f["true_pixels"], strict=True):
        ha = c["area"]["ha"]
        rows.append((f"area of {c['name']}", f"mapped {c['mapped_pixels'] * px_ha:.1f} ha; error-adjusted "
                     f"{ha['estimate']:.1f} ha (95 % interval {ha['ci95'][0]:.1f}–{ha['ci95'][1]:.1f}); "
                     f"true {true * px_ha:.1f} ha"))
    steps = ", ".join(f"{k} {v:.0f} s" for k, v in f["seconds"].items())
    rows.append(("wall time", f"{_minutes(sum(f['seconds'].values()))} on {f['threads']} threads ({steps})"))
    table = "\n".join(["| step | figure |", "|---|---|", *(f"| {k} | {v} |" for k, v in rows)])
    return f"{BEGIN}\n{table}\n{END}"


def rewrite(text: str, block: str) -> str:
    """README text with its figures block replaced."""
    start, end = text.find(BEGIN), text.find(END)
    if start < 0 or end < start:
        raise SystemExit(f"{README}: no figures block (the lines {BEGIN!r} … {END!r})")
    return text[:start] + block + text[end + len(END):]


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--from", dest="source", metavar="DIR", help="a finished demo run's folder")
    parser.add_argument("--out", default="fcnkit-demo", metavar="DIR", help="where to run the demo")
    parser.add_argument("--check", action="store_true", help="compare README.md with docs/demo-figures.json")
    args = parser.parse_args()
    text = README.read_text(encoding="utf-8")
    if args.check:
        ok = rewrite(text, render(json.loads(FIGURES.read_text()))) == text
        print("README figures match docs/demo-figures.json" if ok else "README figures are stale")
        return 0 if ok else 1
    if args.source is None:
        from fcnkit.demo import run_demo

        run_demo(args.out)
        args.source = args.out
    shutil.copyfile(Path(args.source) / "figures.json", FIGURES)
    README.write_text(rewrite(text, render(json.loads(FIGURES.read_text()))), encoding="utf-8")
    print(f"README.md figures rewritten from {Path(args.source) / 'figures.json'}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
