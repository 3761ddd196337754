"""Cross-check: run timm fixtures through a transformers 5.x SwinModel.

Loads the timm weights of a fixture into a transformers 5.x SwinModel (keys
renamed, qkv split in q, k, v order) and compares with the fixture's expected
values. Where both libraries use the same window policy (every stage side a
window multiple) they must agree to float rounding. Sizes where timm uses
non-square per-axis windows cannot be loaded by transformers and are reported
as such. Reads the fixtures only; writes nothing.

    python tests/reference/cross_check.py
"""
import json
import os
import sys

import numpy as np
import torch
from PIL import Image
from safetensors.torch import load_file

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)
import make_fixtures as mf  # noqa: E402

CASES = ["timm_multiple", "pickle_nested", "timm_odd", "timm_clamp_axis"]


def load_weights(d, case):
    path = os.path.join(d, case["weights"])
    if path.endswith(".safetensors"):
        return load_file(path)
    key = case["weights_container"]["key"]
    return {k: v.float() for k, v in torch.load(path, weights_only=True)[key].items()}


def timm_to_tf5(sd):
    new = {}
    for k, v in sd.items():
        if k.startswith("head."):
            continue
        if k.startswith("patch_embed.proj"):
            new[k.replace("patch_embed.proj", "embeddings.patch_embeddings.projection")] = v
            continue
        if k.startswith("patch_embed.norm"):
            new[k.replace("patch_embed.norm", "embeddings.norm")] = v
            continue
        if k.startswith("norm."):
            new[k.replace("norm.", "layernorm.")] = v
            continue
        p = k.split(".")
        i = int(p[1])
        if p[2] == "downsample":  # timm: start of stage i; transformers: end of stage i-1
            new[f"encoder.layers.{i - 1}.downsample." + ".".join(p[3:])] = v
            continue
        pre = f"encoder.layers.{i}.blocks.{p[3]}."
        rest = ".".join(p[4:])
        if rest.startswith("attn.qkv"):
            t = rest.split(".")[-1]
            for n, part in zip(["q_proj", "k_proj", "v_proj"], v.chunk(3, 0)):
                new[pre + f"attention.{n}.{t}"] = part
            continue
        rest = (rest.replace("norm1", "layernorm_before").replace("norm2", "layernorm_after")
                .replace("attn.proj", "attention.o_proj")
                .replace("attn.relative_position_bias_table",
                         "attention.relative_position_bias.relative_position_bias_table"))
        new[pre + rest] = v
    return new


def main():
    from transformers import SwinConfig, SwinModel

    torch.set_num_threads(2)
    for name in CASES:
        d = os.path.join(mf.FIXTURES, name)
        case = json.load(open(os.path.join(d, "case.json")))
        cfg = case["config"]
        exp = load_file(os.path.join(d, "expected.safetensors"))
        W, H = case["size"]
        conf = SwinConfig(image_size=[H, W], patch_size=cfg["patch"], embed_dim=cfg["embed_dim"],
                          depths=cfg["depths"], num_heads=cfg["heads"], window_size=cfg["window"],
                          mlp_ratio=cfg["mlp_ratio"], hidden_act="gelu", layer_norm_eps=1e-5)
        m = SwinModel(conf).eval()
        try:
            missing, unexpected = m.load_state_dict(timm_to_tf5(load_weights(d, case)), strict=False)
        except RuntimeError as e:
            print(f"{name}: transformers cannot hold these weights ({str(e).splitlines()[1].strip()[:90]}...)")
            continue
        assert not unexpected and all("relative_position_index" in k for k in missing), (missing, unexpected)
        x = mf.normalise(np.array(Image.open(os.path.join(d, "input.png"))))
        out = mf.tf_run(m, x, "model")
        print(f"{name}: " + ", ".join(f"{k}={mf.rel_diff(out[k], exp[k]):.1e}" for k in exp))


if __name__ == "__main__":
    main()
