"""Reference values for the two-checkpoint comparison (numpy only; run with numpy 2.4.6).

Writes tests/fixtures/compare/:
  base.safetensors, tuned.safetensors  a tiny backbone in timm >= 0.9 key layout, twice: some
                                       tensors changed, one only in the base, one of another
                                       shape, a classifier tensor only in the tuned file
  expected.json                        the input matrices and the expected values

Linear CKA follows Kornblith, Norouzi, Lee and Hinton (2019), "Similarity of Neural Network
Representations Revisited", ICML, linear kernel: centre the columns of X [n, p] and Y [n, q],
then CKA = ||Y^T X||_F^2 / (||X^T X||_F ||Y^T Y||_F). Cosine per row: a.b / (|a| |b|).
Weight drift: ||B - A||_F / ||A||_F and ||A||_F. Everything in float64 from float32 inputs.

Usage, from the repository root:  python3 tests/reference/compare_reference.py
"""

import json
import struct
from pathlib import Path

import numpy as np

OUT = Path(__file__).resolve().parent.parent / "fixtures" / "compare"


def linear_cka(x, y):
    x = x.astype(np.float64)
    y = y.astype(np.float64)
    x = x - x.mean(axis=0, keepdims=True)
    y = y - y.mean(axis=0, keepdims=True)
    num = np.linalg.norm(y.T @ x, "fro") ** 2
    den = np.linalg.norm(x.T @ x, "fro") * np.linalg.norm(y.T @ y, "fro")
    return float(num / den)


def cosines(a, b):
    a = a.astype(np.float64)
    b = b.astype(np.float64)
    return (a * b).sum(1) / (np.linalg.norm(a, axis=1) * np.linalg.norm(b, axis=1))


def save_safetensors(path, tensors):
    header, blobs, offset = {}, [], 0
    for name in sorted(tensors):
        t = np.ascontiguousarray(tensors[name], dtype="<f4")
        data = t.tobytes()
        header[name] = {"dtype": "F32", "shape": list(t.shape),
                        "data_offsets": [offset, offset + len(data)]}
        blobs.append(data)
        offset += len(data)
    text = json.dumps(header, separators=(",", ":")).encode()
    text += b" " * (-len(text) % 8)
    path.write_bytes(struct.pack("<Q", len(text)) + text + b"".join(blobs))


BLOCK = ["norm1.weight", "norm1.bias", "attn.qkv.weight", "attn.qkv.bias",
         "attn.relative_position_bias_table", "attn.proj.weight", "attn.proj.bias",
         "norm2.weight", "norm2.bias", "mlp.fc1.weight", "mlp.fc1.bias", "mlp.fc2.weight",
         "mlp.fc2.bias"]


def block_shapes(c, heads, window):
    rows = (2 * window - 1) ** 2
    return {"norm1.weight": [c], "norm1.bias": [c], "attn.qkv.weight": [3 * c, c],
            "attn.qkv.bias": [3 * c], "attn.relative_position_bias_table": [rows, heads],
            "attn.proj.weight": [c, c], "attn.proj.bias": [c], "norm2.weight": [c],
            "norm2.bias": [c], "mlp.fc1.weight": [2 * c, c], "mlp.fc1.bias": [2 * c],
            "mlp.fc2.weight": [c, 2 * c], "mlp.fc2.bias": [c]}


def backbone(rng):
    """Depths [1, 1], width 8 then 16, heads [1, 2], window 2, patch 4."""
    t = {"patch_embed.proj.weight": [8, 3, 4, 4], "patch_embed.proj.bias": [8],
         "patch_embed.norm.weight": [8], "patch_embed.norm.bias": [8],
         "layers.1.downsample.norm.weight": [32], "layers.1.downsample.norm.bias": [32],
         "layers.1.downsample.reduction.weight": [16, 32],
         "norm.weight": [16], "norm.bias": [16]}
    for i, (c, h) in enumerate([(8, 1), (16, 2)]):
        for k, s in block_shapes(c, h, 2).items():
            t[f"layers.{i}.blocks.0.{k}"] = s
    return {k: rng.standard_normal(s).astype(np.float32) for k, s in sorted(t.items())}


def main():
    rng = np.random.default_rng(20190609)
    OUT.mkdir(parents=True, exist_ok=True)

    # CKA and cosine on fixed matrices.
    n, p, q = 37, 6, 4
    x = rng.standard_normal((n, p)).astype(np.float32)
    w = rng.standard_normal((p, q)).astype(np.float32)
    y = (x @ w + 0.5 * rng.standard_normal((n, q))).astype(np.float32)
    z = rng.standard_normal((n, 5)).astype(np.float32) + np.float32(3.0)
    a = rng.standard_normal((n, p)).astype(np.float32)
    b = (a + 0.3 * rng.standard_normal((n, p))).astype(np.float32)
    cos = cosines(a, b)

    # The drift pair.
    base = backbone(rng)
    tuned = {k: v.copy() for k, v in base.items()}
    tuned["layers.0.blocks.0.attn.qkv.weight"] += 0.1 * rng.standard_normal((24, 8)).astype(np.float32)
    tuned["layers.1.blocks.0.mlp.fc2.bias"] += 0.5 * rng.standard_normal(16).astype(np.float32)
    tuned["patch_embed.norm.weight"] *= np.float32(1.25)
    tuned["layers.1.downsample.reduction.weight"] -= np.float32(0.01)
    del tuned["norm.bias"]                                   # only in the base
    tuned["layers.1.blocks.0.attn.relative_position_bias_table"] = \
        rng.standard_normal((25, 2)).astype(np.float32)      # another window: another shape
    tuned["head.fc.weight"] = rng.standard_normal((3, 16)).astype(np.float32)  # not backbone
    save_safetensors(OUT / "base.safetensors", base)
    save_safetensors(OUT / "tuned.safetensors", tuned)

    drift = []
    for k in sorted(base):
        if k in tuned and tuned[k].shape == base[k].shape:
            a64, b64 = base[k].astype(np.float64), tuned[k].astype(np.float64)
            bn = float(np.linalg.norm(a64.ravel()))
            drift.append({"tensor": k, "relative_change": float(np.linalg.norm((b64 - a64).ravel()) / bn),
                          "base_norm": bn})

    expected = {
        "generator": "tests/reference/compare_reference.py",
        "numpy": np.__version__,
        "x": x.tolist(), "y": y.tolist(), "z": z.tolist(), "a": a.tolist(), "b": b.tolist(),
        "cka_xy": linear_cka(x, y), "cka_yx": linear_cka(y, x), "cka_xz": linear_cka(x, z),
        "cka_ab": linear_cka(a, b),
        "cosines_ab": cos.tolist(), "mean_cosine_ab": float(cos.mean()),
        "min_cosine_ab": float(cos.min()),
        "drift": drift,
        "unmatched": ["norm.bias", "layers.1.blocks.0.attn.relative_position_bias_table"],
        "not_compared": ["head.fc.weight"],
    }
    (OUT / "expected.json").write_text(json.dumps(expected, indent=1) + "\n")
    print(f"numpy {np.__version__}: cka_xy {expected['cka_xy']:.6f}, cka_xz {expected['cka_xz']:.6f}, "
          f"{len(drift)} drift rows")


if __name__ == "__main__":
    main()
