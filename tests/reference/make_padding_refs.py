"""Reference figures for the padding studies (mullion padding, mullion attention).

Runs the committed `timm_multiple` weights (timm layout) on a new odd-sized image
through both reference libraries and writes tests/fixtures/padding/:

- input.png: 237x229 (W x H), so the input, every stage and every block pads;
- attention.safetensors: attention probabilities `[windows, heads, N, N]` and the
  window layout `[windows, N, 2]` (stage-grid row, col; -1 for padding) of chosen
  blocks, from
  * timm 1.0.31: a forward hook on the block's attention softmax (fused attention
    switched off so the softmax module runs), layout from timm's own roll, pad
    and `window_partition` applied to a map of token positions;
  * transformers 5.23.0 SwinModel (weights renamed, qkv split): the model's own
    `output_attentions=True` (the last block of every stage), layout from the
    layer's own `maybe_pad`, `cyclic_shift` and `window_partition`;
- padding.json: the padding sweep (cosines over the unpadded grid, per library),
  the pad-order disagreement and the attention share on padding keys, every
  number computed in numpy (float64) from those forward passes.

Pad orders: timm rolls, then pads (shift-then-pad); transformers pads, then rolls
(pad-then-shift). At this size every stage side is larger than the window, so
both libraries' small-stage rules leave windows and shifts alone and the two
passes differ only by the pad order: f1 = transformers, f2 = timm. Nothing is
monkeypatched.

    python tests/reference/make_padding_refs.py     # environment: requirements-padding.txt
"""
import json
import os
import sys

import numpy as np
import torch
import torch.nn.functional as F
from PIL import Image
from safetensors.torch import load_file, save_file

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)
import make_fixtures as mf  # noqa: E402
from cross_check import timm_to_tf5  # noqa: E402

OUT = os.path.join(mf.FIXTURES, "padding")
WEIGHTS_CASE = "timm_multiple"
SIZE = (237, 229)  # W x H
SEED = 401
PADS = [0, 8, 16]
THRESHOLD = 1e-3
# (stage, block) kept from timm; transformers gives the last block of every stage.
TIMM_BLOCKS = [(0, 0), (0, 1), (3, 1)]


def versions():
    import timm
    import transformers
    return {"timm": timm.__version__, "transformers": transformers.__version__,
            "torch": torch.__version__.split("+")[0], "numpy": np.__version__}


def position_map(h, w):
    """[1, h, w, 2] float map of (row + 1, col + 1); zero padding reads as (0, 0)."""
    r, c = np.mgrid[0:h, 0:w]
    return torch.from_numpy(np.stack([r + 1, c + 1], -1)[None].astype(np.float64))


def to_tokens(windows):
    """[nW, wh, ww, 2] of (row + 1, col + 1) -> [nW, N, 2] int64 with -1 for padding."""
    t = windows.reshape(windows.shape[0], -1, 2).round().long() - 1
    return t


# --------------------------------------------------------------------------
# timm
# --------------------------------------------------------------------------

def timm_model(cfg, sd, hw):
    m = mf.timm_build(cfg, hw)
    missing, unexpected = m.load_state_dict(sd, strict=False)
    assert not unexpected and all("attn_mask" in k or "relative_position_index" in k for k in missing), \
        (missing, unexpected)
    for layer in m.layers:
        for b in layer.blocks:
            b.attn.fused_attn = False
    return m.eval()


@torch.no_grad()
def timm_pass(cfg, sd, x, keep=()):
    x = mf.pad_to_patch(x, cfg["patch"])
    m = timm_model(cfg, sd, tuple(x.shape[-2:]))
    probs, hooks = {}, []
    for (s, b) in keep:
        blk = m.layers[s].blocks[b]
        hooks.append(blk.attn.softmax.register_forward_hook(
            lambda mod, i, o, k=(s, b): probs.__setitem__(k, o.detach().clone())))
    out = mf.timm_run(m, x)
    for h in hooks:
        h.remove()
    return m, out, probs


def timm_layout(blk, h, w):
    """timm's own steps of `_attn` applied to a position map."""
    from timm.models.swin_transformer import window_partition
    x = position_map(h, w)
    if any(blk.shift_size):
        x = torch.roll(x, shifts=(-blk.shift_size[0], -blk.shift_size[1]), dims=(1, 2))
    ph = (blk.window_size[0] - h % blk.window_size[0]) % blk.window_size[0]
    pw = (blk.window_size[1] - w % blk.window_size[1]) % blk.window_size[1]
    x = F.pad(x, (0, 0, 0, pw, 0, ph))
    return to_tokens(window_partition(x, blk.window_size))


# --------------------------------------------------------------------------
# transformers 5.x
# --------------------------------------------------------------------------

def tf_model(cfg, sd, hw):
    from transformers import SwinConfig, SwinModel
    conf = SwinConfig(image_size=list(hw), patch_size=cfg["patch"], embed_dim=cfg["embed_dim"],
                      depths=cfg["depths"], num_heads=cfg["heads"], window_size=cfg["window"],
                      mlp_ratio=cfg["mlp_ratio"], hidden_act="gelu", layer_norm_eps=1e-5,
                      qkv_bias=True, hidden_dropout_prob=0.0, attention_probs_dropout_prob=0.0,
                      drop_path_rate=0.0)
    conf._attn_implementation = "eager"
    m = SwinModel(conf).eval()
    missing, unexpected = m.load_state_dict(timm_to_tf5(sd), strict=False)
    assert not unexpected and all("relative_position_index" in k for k in missing), (missing, unexpected)
    return m


@torch.no_grad()
def tf_pass(cfg, sd, x, attentions=False):
    m = tf_model(cfg, sd, tuple(x.shape[-2:]))
    out = mf.tf_run(m, x, "model")
    probs = {}
    if attentions:
        res = m(pixel_values=x, output_attentions=True)
        for s, a in enumerate(res.attentions):
            probs[(s, cfg["depths"][s] - 1)] = a.detach().clone()
    return m, out, probs


def tf_layout(layer, h, w):
    """The layer's own maybe_pad, cyclic_shift and window_partition on a position map."""
    from transformers.models.swin.modeling_swin import window_partition
    layer.set_shift_and_window_size((h, w))
    x, _ = layer.maybe_pad(position_map(h, w), h, w)
    return to_tokens(window_partition(layer.cyclic_shift(x), layer.window_size))


# --------------------------------------------------------------------------
# numbers from the passes
# --------------------------------------------------------------------------

def cosines(a, b):
    """Per-token cosine of two [1, H, W, C] maps over a's grid (b cropped top-left)."""
    h, w = a.shape[1:3]
    a = a[0].double().numpy().reshape(h * w, -1)
    b = b[0, :h, :w].double().numpy().reshape(h * w, -1)
    num = (a * b).sum(1)
    den = np.sqrt((a * a).sum(1) * (b * b).sum(1))
    return np.clip(num / den, -1.0, 1.0)


def sweep(outs, n_stages):
    rows = []
    for p, out in outs.items():
        for s in range(n_stages):
            c = cosines(outs[0][f"stage{s}"], out[f"stage{s}"])
            rows.append({"pad_px": p, "stage": s, "mean_cosine": float(c.mean()),
                         "min_cosine": float(c.min()), "tokens": int(c.size)})
    return rows


def orders(f1, f2, n_stages):
    rows = []
    for s in range(n_stages):
        a, b = f1[f"stage{s}"][0].double().numpy(), f2[f"stage{s}"][0].double().numpy()
        d = a - b
        ratio = np.sqrt((d * d).sum(-1)) / np.sqrt((a * a).sum(-1))
        rows.append({"stage": s, "max_rel_diff": float(np.abs(d).max() / np.abs(a).max()),
                     "share_over_1e-3": float((ratio > THRESHOLD).mean()),
                     "tokens": int(ratio.size)})
    return rows


def pad_share(probs, layout):
    """Mean over heads of the weight each real query puts on padding keys; mean and max."""
    p = probs.double().numpy()  # [nW, heads, N, N]
    pad_key = (layout[..., 0] < 0).numpy()  # [nW, N]
    real_q = ~pad_key
    share = (p * pad_key[:, None, None, :]).sum(-1).mean(1)  # [nW, N]
    s = share[real_q]
    return {"mean_share": float(s.mean()), "max_share": float(s.max()), "tokens": int(s.size)}


def main():
    torch.set_num_threads(2)
    os.makedirs(OUT, exist_ok=True)
    wdir = os.path.join(mf.FIXTURES, WEIGHTS_CASE)
    cfg = json.load(open(os.path.join(wdir, "case.json")))["config"]
    sd = load_file(os.path.join(wdir, "weights.safetensors"))
    W, H = SIZE
    u8 = mf.make_image(W, H, SEED)
    Image.fromarray(u8).save(os.path.join(OUT, "input.png"))
    x = mf.normalise(np.array(Image.open(os.path.join(OUT, "input.png"))))
    n = len(cfg["depths"])

    tensors, attention = {}, []
    timm_outs, tf_outs = {}, {}
    for p in PADS:
        xp = F.pad(x, (0, p, 0, p))
        tm, timm_outs[p], tprobs = timm_pass(cfg, sd, xp, keep=TIMM_BLOCKS if p == 0 else ())
        fm, tf_outs[p], fprobs = tf_pass(cfg, sd, xp, attentions=(p == 0))
        if p:
            continue
        tm0, fm0 = tm, fm
        for (s, b), pr in sorted(tprobs.items()):
            h, w = timm_outs[0][f"stage{s}"].shape[1:3]
            lay = timm_layout(tm.layers[s].blocks[b], h, w)
            tensors[f"timm_s{s}_b{b}_probs"] = pr.float().contiguous()
            tensors[f"timm_s{s}_b{b}_window_tokens"] = lay.contiguous()
            attention.append(dict(source="timm", stage=s, block=b, **pad_share(pr, lay)))
        for (s, b), pr in sorted(fprobs.items()):
            h, w = tf_outs[0][f"stage{s}"].shape[1:3]
            lay = tf_layout(fm.encoder.layers[s].blocks[b], h, w)
            tensors[f"tf5_s{s}_b{b}_probs"] = pr.float().contiguous()
            tensors[f"tf5_s{s}_b{b}_window_tokens"] = lay.contiguous()
            attention.append(dict(source="transformers", stage=s, block=b, **pad_share(pr, lay)))
        # The two libraries must agree on the features where their policies coincide in all
        # but the pad order: a sanity check that the renamed weights load as intended.
        for k in ["embed"]:
            assert mf.rel_diff(tf_outs[0][k], timm_outs[0][k]) < 1e-5, k

    save_file(tensors, os.path.join(OUT, "attention.safetensors"))
    v = versions()
    doc = {
        "weights": f"../{WEIGHTS_CASE}/weights.safetensors",
        "image": "input.png",
        "size": [W, H],
        "reference": {"timm": f"timm {v['timm']}, torch {v['torch']}",
                      "transformers": f"transformers {v['transformers']}, torch {v['torch']}",
                      "numpy": f"numpy {v['numpy']}"},
        "pads": PADS,
        "sweep": {"timm": sweep(timm_outs, n), "transformers": sweep(tf_outs, n)},
        "orders": orders(tf_outs[0], timm_outs[0], n),
        "pad_attention": attention,
        "geometry": {"timm": mf.timm_geometry(tm0, timm_outs[0]),
                     "transformers": mf.tf_geometry(fm0, tf_outs[0])},
        "notes": (
            "Sweep: p zero rows (bottom) and p zero columns (right) appended to the normalised input, "
            "then each library's own patch padding; cosines over the unpadded run's stage grid, same "
            "top-left origin. timm is built for each padded size with the same weights. Orders: f1 = "
            "transformers (pad-then-shift), f2 = timm (shift-then-pad), no small stage at this size. "
            "Attention shares: mean over heads of the softmax weight on padding keys, over real queries, "
            "from the stored probabilities and window layouts."),
    }
    with open(os.path.join(OUT, "padding.json"), "w") as f:
        f.write(mf.dump_json(doc))
    print(json.dumps({"orders": doc["orders"], "pad_attention": attention}, indent=1))


if __name__ == "__main__":
    main()
