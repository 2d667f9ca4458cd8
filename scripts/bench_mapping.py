"""Mapping speed of fcnkit's default path against ONNX Runtime and torch on the whole image, with exactness.

For every shipped config (random weights and batch-norm statistics: speed does not depend on them) and one
synthetic uint8 image, each round times, interleaved so a change in the machine's load hits all alike:

* ``fcnkit``: the default mapping path, ``stream_scores`` (exact row streaming), from the uint8 image to logits
  band by band (reading, normalising and the finite-score check included), and ``fcnkit probs`` the same to
  class probabilities (softmax too: what ``segment`` maps);
* ``ort``: the same net exported to ONNX with the normalisation built in (what ``fcnkit export`` writes) and run
  by ONNX Runtime on the whole image at once, from a float32 NCHW array made beforehand to logits: with
  fcnkit's session options (idle threads sleep) and with ONNX Runtime's defaults (idle threads spin); the faster
  of the two in each round is the baseline;
* ``torch-cl``: the model (batch norms folded) run by torch on the whole image, channels_last, inference mode;
* ``fcnkit bf16`` (on CPUs with bfloat16 units, AVX-512 BF16 or AMX, or with ``--bf16``): the default path with
  ``bf16=True``, the opt-in bfloat16 forward pass, with the share of its labels equal to the float32 pass's.

Every figure is a ratio of two timings taken in the same round (>1: fcnkit faster); the script prints the
median and the spread (min–max) over the rounds. The main figure compares like with like (logits from the
image); the ``probs`` one charges fcnkit for the softmax as well. Exactness: fcnkit's logits against the float32
whole-image forward pass of the unfolded net (max |difference|, share of identical labels).

The process sets the C allocator as ``fcnkit``'s command line does, first thing (:mod:`fcnkit.allocator`).

    .venv/bin/python scripts/bench_mapping.py [--side 2048] [--rounds 5] [--threads 2] [--configs demo fcn8s]
"""

from __future__ import annotations

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))  # the fcnkit of this checkout

from fcnkit.allocator import reuse_freed_memory  # noqa: E402

reuse_freed_memory()  # as the command line does, before any thread allocates

import argparse  # noqa: E402
import io  # noqa: E402
import statistics  # noqa: E402
import time  # noqa: E402
import warnings  # noqa: E402
from collections.abc import Callable  # noqa: E402

import numpy as np  # noqa: E402
import torch  # noqa: E402

from fcnkit import Model  # noqa: E402
from fcnkit.config import shipped_configs  # noqa: E402
from fcnkit.data.raster import ArrayRaster  # noqa: E402
from fcnkit.export import write_onnx  # noqa: E402
from fcnkit.inference.engines import TorchEngine  # noqa: E402
from fcnkit.inference.scan import stream_scores  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
CONFIGS = tuple(shipped_configs())  # every config that comes with fcnkit


def random_model(name: str) -> Model:
    """A shipped config's model with random weights, batch-norm statistics and up-sampling kernels (as after
    training, so folding and every layer are exercised), normalising raw pixels by mean 110, std 60."""
    model = Model.build(name).eval()
    model.set_normalisation([110.0] * model.bands, [60.0] * model.bands)
    g = torch.Generator().manual_seed(1)
    for m in model.modules():
        if isinstance(m, torch.nn.BatchNorm2d):
            m.running_mean.copy_(torch.rand(m.num_features, generator=g) - 0.5)
            m.running_var.copy_(torch.rand(m.num_features, generator=g) + 0.5)
        if isinstance(m, torch.nn.ConvTranspose2d):
            m.weight.data.add_(0.1 * torch.randn(m.weight.shape, generator=g))
    return model


def ort_sessions(model: Model, threads: int) -> dict[str, object]:
    """The exported model (normalisation built in, as ``fcnkit export`` writes it) in two ONNX Runtime sessions:
    fcnkit's options (idle threads sleep) and ONNX Runtime's defaults (idle threads spin)."""
    import onnxruntime as ort

    buf = io.BytesIO()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        write_onnx(model, torch.zeros(1, model.bands, 64, 64), buf, {})
    sessions = {}
    for name, spin in (("ort-nospin", "0"), ("ort-spin", "1")):
        opts = ort.SessionOptions()
        opts.intra_op_num_threads = threads
        opts.log_severity_level = 3
        opts.add_session_config_entry("session.intra_op.allow_spinning", spin)
        sessions[name] = ort.InferenceSession(buf.getvalue(), opts, providers=["CPUExecutionProvider"])
    return sessions


def has_bf16_units() -> bool:
    """Whether this CPU computes in bfloat16 natively (AVX-512 BF16 or AMX), as torch sees it."""
    return any(getattr(torch.cpu, f, lambda: False)() for f in ("_is_avx512_bf16_supported", "_is_amx_tile_supported"))


def bench(name: str, side: int, rounds: int, threads: int, bf16: bool) -> dict:
    model = random_model(name)
    img = np.random.default_rng(0).integers(0, 256, (side, side, model.bands), dtype=np.uint8)
    raw = np.ascontiguousarray(img.transpose(2, 0, 1)[None].astype(np.float32))
    x_cl = torch.from_numpy(raw).contiguous(memory_format=torch.channels_last)
    sessions = ort_sessions(model, threads)
    cl = TorchEngine(model)

    def fcnkit(logits: bool, bf16: bool = False) -> None:
        for _ in stream_scores(model, ArrayRaster(img), logits=logits, bf16=bf16):
            pass

    fns: dict[str, Callable[[], object]] = {"fcnkit": lambda: fcnkit(True), "fcnkit-probs": lambda: fcnkit(False),
                                            "torch-cl": lambda: cl(x_cl)}
    if bf16:
        fns["fcnkit-bf16"] = lambda: fcnkit(True, bf16=True)
    for k, s in sessions.items():
        fns[k] = lambda s=s: s.run(None, {"image": raw})
    for fn in fns.values():  # warm-up: kernels chosen, model prepared
        fn()
    times: dict[str, list[float]] = {k: [] for k in fns}
    for _ in range(rounds):
        for k, fn in fns.items():
            t = time.perf_counter()
            fn()
            times[k].append(time.perf_counter() - t)
    ort_best = [min(a, b) for a, b in zip(times["ort-nospin"], times["ort-spin"], strict=True)]

    # Exactness against the float32 whole-image forward pass of the model as built (no folding, NCHW).
    with torch.no_grad():
        ref = model(torch.from_numpy(raw))[0]

    def logits(bf16: bool = False) -> torch.Tensor:  # fcnkit's logits of the whole image, its bands joined
        return torch.cat([b for _, b in stream_scores(model, ArrayRaster(img), logits=True, bf16=bf16)], dim=1)

    def same_labels(y: torch.Tensor) -> float:  # share of labels equal to the float32 whole-image pass's
        return float((y.argmax(0) == ref.argmax(0)).float().mean())

    got = logits()
    ort_logits = torch.from_numpy(sessions["ort-nospin"].run(None, {"image": raw})[0][0])

    def ratio(base: list[float], ours: str = "fcnkit") -> list[float]:
        return [b / f for b, f in zip(base, times[ours], strict=True)]

    mp = side * side / 1e6
    return {
        "bf16_over_ort": ratio(ort_best, "fcnkit-bf16") if bf16 else None,
        "bf16_labels": same_labels(logits(True)) if bf16 else None,
        "config": name, "mp": mp,
        "mp_s": {k: mp / min(v) for k, v in times.items()},
        "over_ort": ratio(ort_best), "probs_over_ort": ratio(ort_best, "fcnkit-probs"),
        "over_torch_cl": ratio(times["torch-cl"]),
        "max_diff": float((got - ref).abs().max()), "labels": same_labels(got),
        "ort_max_diff": float((ort_logits - ref).abs().max()),
    }


def spread(v: list[float]) -> str:
    return f"{statistics.median(v):.2f} ({min(v):.2f}–{max(v):.2f})"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--side", type=int, default=2048)
    ap.add_argument("--rounds", type=int, default=5)
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--configs", nargs="+", default=list(CONFIGS), choices=CONFIGS)
    ap.add_argument("--bf16", action="store_true", help="time the bfloat16 path even without bfloat16 units "
                    "(8-11x slower than float32 on an AVX2 CPU)")
    a = ap.parse_args()
    bf16 = a.bf16 or has_bf16_units()
    torch.set_num_threads(a.threads)
    import onnxruntime

    print(f"torch {torch.__version__}, onnxruntime {onnxruntime.__version__}, {a.threads} threads, "
          f"{a.side}x{a.side} image, {a.rounds} interleaved rounds; ratios: median (min–max) over rounds, "
          ">1 means fcnkit is faster")
    print(f"{'config':8s} {'fcnkit/ORT':>18s} {'probs/ORT':>18s} {'fcnkit/torch-cl':>18s} "
          f"{'max|dlogit|':>11s} {'labels':>8s}" + (f" {'bf16/ORT':>18s} {'bf16 labels':>11s}" if bf16 else "")
          + "  MP/s (best round)")
    for name in a.configs:
        r = bench(name, a.side, a.rounds, a.threads, bf16)
        speeds = " ".join(f"{k} {v:.2f}" for k, v in r["mp_s"].items())
        low = f" {spread(r['bf16_over_ort']):>18s} {r['bf16_labels']:11.4%}" if bf16 else ""
        print(f"{name:8s} {spread(r['over_ort']):>18s} {spread(r['probs_over_ort']):>18s} "
              f"{spread(r['over_torch_cl']):>18s} {r['max_diff']:11.1e} {r['labels']:8.4%}{low}  {speeds}", flush=True)


if __name__ == "__main__":
    main()
