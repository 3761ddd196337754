"""Time the PyTorch reference forward pass of Swin-T or Swin-B, to set beside
our own binary's timings.

    python tests/reference/bench_torch.py [--preset tiny|base] [--size 224|HxW] [--threads 2] [--runs 10]

Builds timm `swin_{tiny,base}_patch4_window7_224` and a transformers `SwinModel`
with the same configuration (Swin-T: embed 96, depths 2-2-6-2, heads 3-6-12-24;
Swin-B: embed 128, depths 2-2-18-2, heads 4-8-16-32; window 7; Liu et al. 2021,
Table 1), both randomly initialised (nothing is downloaded), eval mode, float32,
no grad, batch 1, an `H x W` input (`--size 224` means 224x224). Each library runs in its own child
process so that its peak RSS is its own. Prints one line per library:

    timm 1.0.31, torch 2.15.0: size=224 threads=2 runs=10 median_ms=... peak_rss_mb=...

A library that is not installed in the current environment is reported as
skipped.
"""
import argparse
import json
import resource
import statistics
import subprocess
import sys
import time


PRESETS = {
    "tiny": dict(embed_dim=96, depths=[2, 2, 6, 2], num_heads=[3, 6, 12, 24]),
    "base": dict(embed_dim=128, depths=[2, 2, 18, 2], num_heads=[4, 8, 16, 32]),
}


def parse_size(text):
    h, _, w = text.lower().partition("x")
    return (int(h), int(w or h))


def build_timm(preset, size):
    import timm
    import torch

    m = timm.create_model(f"swin_{preset}_patch4_window7_224", pretrained=False, img_size=size)
    return m, lambda x: m.forward_features(x), f"timm {timm.__version__}, torch {torch.__version__.split('+')[0]}"


def build_transformers(preset, size):
    import torch
    import transformers
    from transformers import SwinConfig, SwinModel

    cfg = SwinConfig(image_size=list(size), patch_size=4, window_size=7, mlp_ratio=4.0,
                     **PRESETS[preset])
    m = SwinModel(cfg, add_pooling_layer=False)
    return m, lambda x: m(pixel_values=x).last_hidden_state, \
        f"transformers {transformers.__version__}, torch {torch.__version__.split('+')[0]}"


def child(lib, preset, size, threads, runs, warmup):
    import torch

    torch.set_num_threads(threads)
    torch.manual_seed(0)
    try:
        model, fwd, ver = (build_timm if lib == "timm" else build_transformers)(preset, size)
    except ImportError as e:
        print(json.dumps({"lib": lib, "skipped": str(e)}))
        return
    model.eval()
    x = torch.randn(1, 3, size[0], size[1])
    times = []
    with torch.inference_mode():
        for _ in range(warmup):
            fwd(x)
        for _ in range(runs):
            t0 = time.perf_counter()
            fwd(x)
            times.append((time.perf_counter() - t0) * 1000.0)
    # ru_maxrss is in KiB on Linux
    rss_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    print(json.dumps({"lib": lib, "version": ver, "median_ms": statistics.median(times),
                      "min_ms": min(times), "peak_rss_mb": rss_mb}))


def main():
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--preset", choices=sorted(PRESETS), default="tiny")
    ap.add_argument("--size", default="224", help="side in pixels, or HxW")
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--runs", type=int, default=10)
    ap.add_argument("--warmup", type=int, default=2)
    ap.add_argument("--lib", choices=["timm", "transformers"], action="append",
                    help="only these libraries (default: both)")
    ap.add_argument("--child", choices=["timm", "transformers"], help=argparse.SUPPRESS)
    a = ap.parse_args()
    if a.child:
        child(a.child, a.preset, parse_size(a.size), a.threads, a.runs, a.warmup)
        return
    for lib in a.lib or ["timm", "transformers"]:
        cmd = [sys.executable, __file__, "--child", lib, "--preset", a.preset, "--size", a.size,
               "--threads", str(a.threads), "--runs", str(a.runs), "--warmup", str(a.warmup)]
        res = subprocess.run(cmd, capture_output=True, text=True)
        lines = [l for l in res.stdout.splitlines() if l.startswith("{")]
        if res.returncode != 0 or not lines:
            print(f"{lib}: failed (exit {res.returncode}): {res.stderr.strip()[-500:]}")
            continue
        r = json.loads(lines[-1])
        if "skipped" in r:
            print(f"{lib}: skipped ({r['skipped']})")
            continue
        print(f"{r['version']}: preset={a.preset} size={a.size} threads={a.threads} runs={a.runs} "
              f"median_ms={r['median_ms']:.1f} min_ms={r['min_ms']:.1f} peak_rss_mb={r['peak_rss_mb']:.0f}")


if __name__ == "__main__":
    main()
