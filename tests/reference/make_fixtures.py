"""Build small randomly initialised Swin models with a reference library and
write the fixtures the Rust tests compare against.

One run per library environment (see README.md for the pinned environments):

    python tests/reference/make_fixtures.py --lib timm
    python tests/reference/make_fixtures.py --lib tf4
    python tests/reference/make_fixtures.py --lib tf5
    python tests/reference/make_fixtures.py --lib toolkit   # timm 1.0.x + transformers 5.x

`--lib toolkit` re-lays a timm model's weights exactly as the OpenMMLab
detection toolkit's published converter does (3.x layout) and takes the
expected values from a transformers SwinBackbone, which computes with the
toolkit's padding semantics.

Each case directory under tests/fixtures/ gets input.png, the weights, an
expected.safetensors with NHWC float32 activations and a case.json. Nothing
expected is typed in by hand: every value comes from running the library.

`--sanity` additionally perturbs the model (tanh GELU, LayerNorm eps 1e-6) and
prints how far the stage outputs move, to show that the fixtures would catch
such mistakes.
"""
import argparse
import copy
import json
import math
import os
import re
import sys

import numpy as np
import torch
import torch.nn as nn
import torch.nn.functional as F
from PIL import Image
from safetensors.torch import save_file

HERE = os.path.dirname(os.path.abspath(__file__))
FIXTURES = os.path.normpath(os.path.join(HERE, "..", "fixtures"))

MEAN_LIST = [0.485, 0.456, 0.406]
STD_LIST = [0.229, 0.224, 0.225]
MEAN = np.array(MEAN_LIST, dtype=np.float32)
STD = np.array(STD_LIST, dtype=np.float32)

# Every case the three environments produce; cases.json always lists all of
# them so a partial regeneration does not drop the others from the index.
CASES = {
    # ---- timm ----
    "timm_multiple": dict(
        lib="timm", size=(224, 224), embed_dim=16, depths=[2, 2, 4, 2], heads=[1, 2, 2, 4],
        window=7, patch=4, mlp_ratio=4.0, seed=101),
    "timm_odd": dict(
        lib="timm", size=(150, 115), embed_dim=16, depths=[2, 2, 2, 2], heads=[2, 2, 4, 4],
        window=7, patch=4, mlp_ratio=2.0, seed=102),
    "timm_clamp_axis": dict(
        lib="timm", size=(224, 96), embed_dim=16, depths=[2, 2, 2, 2], heads=[1, 2, 4, 4],
        window=7, patch=4, mlp_ratio=2.0, seed=103),
    "timm_window12": dict(
        lib="timm", size=(200, 180), embed_dim=16, depths=[2, 2, 2, 2], heads=[1, 2, 2, 4],
        window=12, patch=4, mlp_ratio=2.0, seed=104),
    "timm_always_partition": dict(
        lib="timm", size=(160, 128), embed_dim=16, depths=[2, 2, 2, 2], heads=[1, 2, 2, 4],
        window=7, patch=4, mlp_ratio=2.0, seed=105, always_partition=True),
    "pickle_nested": dict(
        lib="timm", size=(112, 112), embed_dim=16, depths=[2, 2, 2], heads=[1, 2, 4],
        window=7, patch=4, mlp_ratio=4.0, seed=111, pickle=("state_dict", torch.float16)),
    "pickle_nested_bf16": dict(
        lib="timm", size=(96, 128), embed_dim=16, depths=[2, 2, 2], heads=[2, 2, 4],
        window=7, patch=4, mlp_ratio=4.0, seed=112, pickle=("model", torch.bfloat16)),
    # ---- transformers 4.x ----
    "tf4_odd": dict(
        lib="tf4", size=(97, 160), embed_dim=24, depths=[2, 2, 4], heads=[2, 3, 6],
        window=7, patch=4, mlp_ratio=4.0, seed=201, wrapper="model"),
    "tf4_pad_up": dict(
        lib="tf4", size=(100, 76), embed_dim=16, depths=[2, 2, 2, 2], heads=[1, 2, 4, 4],
        window=7, patch=4, mlp_ratio=2.0, seed=202, wrapper="backbone"),
    "tf4_backbone_prefixed": dict(
        lib="tf4", size=(129, 131), embed_dim=16, depths=[2, 2, 2], heads=[1, 2, 4],
        window=7, patch=4, mlp_ratio=4.0, seed=203, wrapper="classifier"),
    "detector_prefixed": dict(
        lib="tf4", size=(181, 143), embed_dim=16, depths=[2, 2, 2, 2], heads=[1, 2, 4, 8],
        window=7, patch=4, mlp_ratio=4.0, seed=204, wrapper="detector"),
    # ---- transformers 5.x ----
    "tf5_odd": dict(
        lib="tf5", size=(203, 234), embed_dim=16, depths=[2, 2, 2, 2], heads=[2, 2, 4, 4],
        window=7, patch=4, mlp_ratio=2.0, seed=301, wrapper="model"),
    # ---- OpenMMLab 3.x layout (timm weights, transformers 5.x SwinBackbone forward) ----
    "toolkit3_nested": dict(
        lib="toolkit", size=(101, 71), embed_dim=8, depths=[2, 2, 2], heads=[1, 2, 4],
        window=7, patch=4, mlp_ratio=2.0, seed=401),
}


# --------------------------------------------------------------------------
# shared helpers
# --------------------------------------------------------------------------

def versions(lib):
    tv = torch.__version__.split("+")[0]
    if lib == "toolkit":
        import timm
        import transformers
        return f"transformers {transformers.__version__} SwinBackbone (weights from timm " \
               f"{timm.__version__}), torch {tv}"
    if lib == "timm":
        import timm
        return f"timm {timm.__version__}, torch {tv}"
    import transformers
    return f"transformers {transformers.__version__}, torch {tv}"


def make_image(w, h, seed):
    """Smooth colour gradients, a few oriented waves and pixel noise: enough
    structure that neighbouring windows differ, enough noise that no two
    tokens are equal (outside the flat patch below)."""
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[0:h, 0:w].astype(np.float64)
    u, v = xx / max(w - 1, 1), yy / max(h - 1, 1)
    chans = []
    for c in range(3):
        a, b, fx, fy, ph = rng.uniform(-1, 1, 2).tolist() + rng.uniform(2, 9, 2).tolist() + [rng.uniform(0, 6.3)]
        base = 0.5 + 0.25 * (a * u + b * v)
        wave = 0.18 * np.sin(2 * np.pi * (fx * u + fy * v) + ph)
        blob = 0.15 * np.exp(-((u - rng.uniform(0.2, 0.8)) ** 2 + (v - rng.uniform(0.2, 0.8)) ** 2) / 0.05)
        chans.append(base + wave + blob)
    img = np.stack(chans, axis=-1) + rng.normal(0, 0.06, (h, w, 3))
    u8 = np.clip(np.round(img * 255), 0, 255).astype(np.uint8)
    # A flat patch at the normalisation mean: its patch-embedding tokens are
    # almost only the conv bias, so their LayerNorm variance is small and the
    # LayerNorm eps visibly matters there.
    y0, x0 = h // 5, w // 2
    u8[y0:y0 + max(h // 3, 8), x0:x0 + max(w // 3, 8)] = np.round(MEAN * 255).astype(np.uint8)
    return u8


def normalise(u8):
    x = (u8.astype(np.float32) / np.float32(255.0) - MEAN) / STD
    return torch.from_numpy(np.ascontiguousarray(x.transpose(2, 0, 1)[None])).float()


def pad_to_patch(x, patch):
    h, w = x.shape[-2:]
    return F.pad(x, (0, (-w) % patch, 0, (-h) % patch))


@torch.no_grad()
def randomise(model, seed):
    """Replace every parameter with values large enough that each branch
    (attention pattern, bias table, norms, MLP) visibly shapes the output;
    the libraries' 0.02 init makes attention nearly uniform."""
    g = torch.Generator().manual_seed(seed)

    def n(shape):
        return torch.randn(shape, generator=g, dtype=torch.float32)

    done = set()
    for mname, mod in model.named_modules():
        for pname, p in mod.named_parameters(recurse=False):
            full = f"{mname}.{pname}" if mname else pname
            if isinstance(mod, nn.LayerNorm):
                val = 1.0 + 0.1 * n(p.shape) if pname == "weight" else 0.1 * n(p.shape)
            elif "relative_position_bias_table" in pname:
                val = 0.5 * n(p.shape)
            elif isinstance(mod, (nn.Linear, nn.Conv2d)):
                if pname == "weight":
                    fan_in = p[0].numel()
                    val = n(p.shape) / math.sqrt(fan_in)
                else:
                    val = 0.1 * n(p.shape)
            else:
                raise RuntimeError(f"no randomisation rule for {full} ({type(mod).__name__})")
            p.copy_(val)
            done.add(full)
    missing = [k for k, _ in model.named_parameters() if k not in done]
    if missing:
        raise RuntimeError(f"parameters left at library init: {missing[:5]}")


def nhwc(t, h, w):
    """[1, L, C] token sequence or [1, H, W, C] map -> contiguous [1, H, W, C]."""
    if t.dim() == 3:
        t = t.reshape(t.shape[0], h, w, t.shape[-1])
    assert t.shape[1] == h and t.shape[2] == w, (t.shape, h, w)
    return t.detach().float().contiguous().clone()


def rel_diff(a, b):
    return float((a - b).abs().max() / b.abs().max())


def write_case(name, cfg, u8, weights, weights_file, expected, geometry, layout, pad_order,
               small_stage, notes, extra=None):
    d = os.path.join(FIXTURES, name)
    os.makedirs(d, exist_ok=True)
    for f in os.listdir(d):
        os.remove(os.path.join(d, f))
    Image.fromarray(u8).save(os.path.join(d, "input.png"))
    wpath = os.path.join(d, weights_file)
    if weights_file.endswith(".safetensors"):
        save_file({k: v.contiguous().clone() for k, v in weights.items()}, wpath)
    else:
        torch.save(weights, wpath)
    for k, v in expected.items():
        assert v.dtype == torch.float32 and v.dim() == 4 and v.shape[0] == 1, (k, v.shape)
        assert torch.isfinite(v).all(), k
    save_file(expected, os.path.join(d, "expected.safetensors"))
    case = {
        "name": name,
        "reference": versions(cfg["lib"]),
        "layout": layout,
        "image": "input.png",
        "weights": weights_file,
        "expected": "expected.safetensors",
        "size": list(cfg["size"]),
        "pad_order": pad_order,
        "small_stage": small_stage,
        "config": {
            "embed_dim": cfg["embed_dim"], "depths": cfg["depths"], "heads": cfg["heads"],
            "window": cfg["window"], "patch": cfg["patch"], "mlp_ratio": cfg["mlp_ratio"],
            "layer_norm_eps": 1e-5, "act": "gelu (exact, erf)", "qkv_bias": True,
        },
        "normalisation": {"mean": MEAN_LIST, "std": STD_LIST,
                          "formula": "x = (u8 / 255 - mean) / std, float32, NCHW"},
        "outputs": {k: list(v.shape) for k, v in expected.items()},
        "geometry": geometry,
        "notes": notes,
    }
    if extra:
        case.update(extra)
    with open(os.path.join(d, "case.json"), "w") as f:
        f.write(dump_json(case))
    print(f"[{name}] {case['reference']}; outputs " +
          ", ".join(f"{k}{list(v.shape)}" for k, v in expected.items()))
    for i, g in enumerate(geometry):
        print(f"    stage{i}: grid {g['grid']} window {g['window']} shift {g['shift']} padded {g['padded']}")


def dump_json(obj):
    """Indented JSON with short number lists kept on one line."""
    text = json.dumps(obj, indent=2)
    return re.sub(r"\[\s*([-0-9.e,\s]+?)\s*\]",
                  lambda m: "[" + ", ".join(v.strip() for v in m.group(1).split(",")) + "]", text) + "\n"


def write_index():
    from make_v2_fixtures import V2_CASES  # Swin V2 cases, written by make_v2_fixtures.py

    with open(os.path.join(FIXTURES, "cases.json"), "w") as f:
        json.dump(sorted(set(CASES) | set(V2_CASES)), f, indent=2)
        f.write("\n")


def swap_gelu_tanh(model):
    for parent in model.modules():
        for cname, child in list(parent.named_children()):
            if "GELU" in type(child).__name__:
                setattr(parent, cname, nn.GELU(approximate="tanh"))


def set_ln_eps(model, eps):
    for m in model.modules():
        if isinstance(m, nn.LayerNorm):
            m.eps = eps


def report_sanity(name, base, run_fn, model):
    """Re-run a perturbed copy and print max|diff|/max|expected| per output."""
    rows = []
    for label, mutate in (("gelu_tanh", swap_gelu_tanh),
                          ("ln_eps_1e-6", lambda m: set_ln_eps(m, 1e-6))):
        m2 = copy.deepcopy(model)
        mutate(m2)
        out = run_fn(m2)
        diffs = {k: rel_diff(out[k], base[k]) for k in base if k.startswith("stage") or k == "final_norm"}
        rows.append((label, diffs))
        print(f"[{name}] sanity {label}: " + ", ".join(f"{k}={v:.2e}" for k, v in diffs.items()))
    return rows


# --------------------------------------------------------------------------
# timm
# --------------------------------------------------------------------------

def timm_build(cfg, img_hw, strict=True):
    from timm.models.swin_transformer import SwinTransformer

    m = SwinTransformer(
        img_size=img_hw, patch_size=cfg["patch"], in_chans=3, num_classes=8,
        embed_dim=cfg["embed_dim"], depths=tuple(cfg["depths"]), num_heads=tuple(cfg["heads"]),
        window_size=cfg["window"], mlp_ratio=cfg["mlp_ratio"], qkv_bias=True,
        drop_rate=0.0, proj_drop_rate=0.0, attn_drop_rate=0.0, drop_path_rate=0.0,
        always_partition=cfg.get("always_partition", False), strict_img_size=strict,
    )
    return m.eval()


@torch.no_grad()
def timm_run(model, x):
    """One real forward_features call; the hooks only record what passes."""
    rec = {}
    hooks = [model.patch_embed.register_forward_hook(lambda m, i, o: rec.__setitem__("embed", o))]
    for i, layer in enumerate(model.layers):
        hooks.append(layer.register_forward_hook(lambda m, inp, o, i=i: rec.__setitem__(f"stage{i}", o)))
    feats = model.forward_features(x)
    for h in hooks:
        h.remove()
    out = {"embed": rec["embed"]}
    for i in range(len(model.layers)):
        out[f"stage{i}"] = rec[f"stage{i}"]
    out["final_norm"] = feats
    last = out[f"stage{len(model.layers) - 1}"]
    assert torch.equal(model.norm(last), feats)
    return {k: v.float().contiguous().clone() for k, v in out.items()}


def timm_geometry(model, out):
    geo = []
    for i, layer in enumerate(model.layers):
        _, h, w, _ = out[f"stage{i}"].shape
        blocks = []
        for b in layer.blocks:
            win, sh = tuple(b.window_size), tuple(b.shift_size)
            blocks.append({"window": list(win), "shift": list(sh)})
        win = blocks[0]["window"]
        shift = [max(bl["shift"][a] for bl in blocks) for a in range(2)]
        static = list(layer.blocks[0].input_resolution)
        assert static == [h, w], f"timm static resolution {static} != real grid {[h, w]}"
        geo.append({
            "grid": [h, w], "window": win, "shift": shift,
            "padded": [math.ceil(h / win[0]) * win[0], math.ceil(w / win[1]) * win[1]],
            "blocks": blocks,
            "bias_table_rows": int(layer.blocks[0].attn.relative_position_bias_table.shape[0]),
        })
    return geo


def run_timm_case(name, cfg, sanity):
    W, H = cfg["size"]
    p = cfg["patch"]
    u8 = make_image(W, H, cfg["seed"])
    x = pad_to_patch(normalise(u8), p)
    hp, wp = x.shape[-2:]
    torch.manual_seed(cfg["seed"])
    model = timm_build(cfg, (hp, wp))
    randomise(model, cfg["seed"])

    pick = cfg.get("pickle")
    notes = []
    extra = {}
    if pick:
        key, dt = pick
        sd_low = {k: v.to(dt) for k, v in model.state_dict().items()}
        model.load_state_dict({k: v.float() for k, v in sd_low.items()})
        weights, weights_file = {key: sd_low}, "weights.pth"
        dname = str(dt).replace("torch.", "")
        notes.append(
            f"weights.pth is torch.save of a dict with one key '{key}' holding the timm state_dict "
            f"stored as {dname}. The expected outputs come from the float32 model whose weights "
            f"were rounded through {dname} (loaded back, run in float32).")
        extra["weights_container"] = {"format": "torch.save zip pickle", "key": key, "dtype": dname}
    else:
        weights, weights_file = model.state_dict(), "weights.safetensors"

    out = timm_run(model, x)

    # The static-mask model (strict img_size) and the dynamic-mask model must
    # agree, otherwise the fixture would depend on a timm construction detail.
    dyn = timm_build(cfg, (hp, wp), strict=False)
    dyn.load_state_dict(model.state_dict())
    out_dyn = timm_run(dyn, x)
    dyn_diff = max(float((out[k] - out_dyn[k]).abs().max()) for k in out)
    assert dyn_diff == 0.0 or dyn_diff < 1e-6, dyn_diff

    geo = timm_geometry(model, out)
    if (hp, wp) != (H, W):
        notes.append(
            f"timm does not pad the image to the patch size (its conv would drop the last "
            f"{H % p} rows / {W % p} columns), so the normalised input was zero-padded bottom/right "
            f"to {wp}x{hp} (W x H) before the model and the timm model was built with that img_size.")
    notes.append(
        "timm 1.0.x stage resolutions are ceil((grid)/2^i), which equals the real padded merging; "
        "each stage's static input_resolution was checked against the real grid.")
    notes.append(
        f"static-mask model (strict_img_size=True) vs dynamic-mask model (strict_img_size=False) "
        f"max |diff| = {dyn_diff:.1e}.")
    notes.append(
        "timm order per block: norm1, cyclic roll by -shift, zero-pad bottom/right to a window "
        "multiple, window attention with the mask built on the padded grid, crop, roll back "
        "(shift-then-pad). Window/shift per axis: if stage side <= window then window = side and "
        "shift = 0 on that axis (non-square windows possible).")
    if cfg.get("always_partition"):
        notes.append(
            "always_partition=True: windows and shifts stay at the configured size even when the "
            "stage is smaller; the stage is padded up to the window (after the roll).")
    notes.append("weights include the classifier head.fc.* (8 classes), which is not part of the backbone.")
    if any(g["window"][0] != g["window"][1] for g in geo):
        notes.append("at least one stage uses a non-square window; its bias table has "
                     "(2*wh-1)*(2*ww-1) rows (see geometry.bias_table_rows).")

    write_case(name, cfg, u8, weights, weights_file, out, geo, layout="timm",
               pad_order="shift-then-pad",
               small_stage="pad-up" if cfg.get("always_partition") else "clamp-per-axis",
               notes=" ".join(notes),
               extra=dict(extra or {}, **({"default_semantics": False} if cfg.get("always_partition") else {})))
    if sanity:
        report_sanity(name, out, lambda m: timm_run(m, x), model)


# --------------------------------------------------------------------------
# transformers (4.x and 5.x)
# --------------------------------------------------------------------------

def tf_config(cfg, W, H):
    from transformers import SwinConfig

    n = len(cfg["depths"])
    return SwinConfig(
        image_size=[H, W], patch_size=cfg["patch"], num_channels=3, embed_dim=cfg["embed_dim"],
        depths=cfg["depths"], num_heads=cfg["heads"], window_size=cfg["window"],
        mlp_ratio=cfg["mlp_ratio"], qkv_bias=True, hidden_dropout_prob=0.0,
        attention_probs_dropout_prob=0.0, drop_path_rate=0.0, hidden_act="gelu",
        use_absolute_embeddings=False, layer_norm_eps=1e-5, num_labels=5,
        out_features=[f"stage{i + 1}" for i in range(n)],
    )


def tf_swin(model):
    """The SwinModel-like part (embeddings + encoder) inside any wrapper."""
    return model.swin if hasattr(model, "swin") else model


@torch.no_grad()
def tf_run(model, x, wrapper):
    """One real library forward; hooks on the embeddings and on the last block
    of each stage record the pre-merging stage outputs."""
    sw = tf_swin(model)
    rec = {}
    hooks = [sw.embeddings.register_forward_hook(lambda m, i, o: rec.__setitem__("embed", o))]
    for i, stage in enumerate(sw.encoder.layers):
        def hook(m, args, kwargs, o, i=i):
            dims = args[1] if len(args) > 1 else kwargs["input_dimensions"]
            rec[f"stage{i}"] = (o[0] if isinstance(o, tuple) else o, tuple(int(d) for d in dims))
        hooks.append(stage.blocks[-1].register_forward_hook(hook, with_kwargs=True))
    if hasattr(sw, "layernorm"):
        hooks.append(sw.layernorm.register_forward_hook(lambda m, i, o: rec.__setitem__("final", o)))
    res = model(pixel_values=x)
    for h in hooks:
        h.remove()
    emb, dims = rec["embed"]
    out = {"embed": nhwc(emb, *dims)}
    n = len(sw.encoder.layers)
    for i in range(n):
        t, (h, w) = rec[f"stage{i}"]
        out[f"stage{i}"] = nhwc(t, h, w)
    last = out[f"stage{n - 1}"]
    if wrapper in ("backbone", "detector"):
        for i, fm in enumerate(res.feature_maps):
            out[f"stage{i}_norm"] = fm.permute(0, 2, 3, 1).float().contiguous().clone()
            ln = model.hidden_states_norms[f"stage{i + 1}"]
            assert torch.allclose(ln(out[f"stage{i}"]), out[f"stage{i}_norm"], atol=1e-5)
    if "final" in rec:
        out["final_norm"] = nhwc(rec["final"], last.shape[1], last.shape[2])
        assert torch.allclose(sw.layernorm(last), out["final_norm"], atol=1e-6)
    return out


def tf_geometry(model, out):
    sw = tf_swin(model)
    geo = []
    for i, stage in enumerate(sw.encoder.layers):
        _, h, w, _ = out[f"stage{i}"].shape
        blocks = []
        for b in stage.blocks:
            win, sh = int(b.window_size), int(b.shift_size)
            blocks.append({"window": [win, win], "shift": [sh, sh]})
        win = blocks[0]["window"]
        shift = [max(bl["shift"][a] for bl in blocks) for a in range(2)]
        attn = stage.blocks[0].attention
        table = attn.self.relative_position_bias_table if hasattr(attn, "self") else \
            attn.relative_position_bias.relative_position_bias_table
        geo.append({
            "grid": [h, w], "window": win, "shift": shift,
            "padded": [math.ceil(h / win[0]) * win[0], math.ceil(w / win[1]) * win[1]],
            "blocks": blocks, "bias_table_rows": int(table.shape[0]),
        })
    return geo


def tf_to_original(sd, n_stages, extra_seed):
    """transformers 4.x SwinBackbone keys -> original (detector) layout under
    `backbone.`, plus neck/head tensors a backbone loader has to skip."""
    out = {}
    P = "backbone."
    out[P + "patch_embed.proj.weight"] = sd["embeddings.patch_embeddings.projection.weight"]
    out[P + "patch_embed.proj.bias"] = sd["embeddings.patch_embeddings.projection.bias"]
    out[P + "patch_embed.norm.weight"] = sd["embeddings.norm.weight"]
    out[P + "patch_embed.norm.bias"] = sd["embeddings.norm.bias"]
    used = {k for k in sd if k.startswith("embeddings.")}
    for i in range(n_stages):
        j = 0
        while f"encoder.layers.{i}.blocks.{j}.layernorm_before.weight" in sd:
            s = f"encoder.layers.{i}.blocks.{j}."
            d = f"{P}layers.{i}.blocks.{j}."
            for t in ("weight", "bias"):
                out[d + f"norm1.{t}"] = sd[s + f"layernorm_before.{t}"]
                out[d + f"attn.qkv.{t}"] = torch.cat(
                    [sd[s + f"attention.self.{q}.{t}"] for q in ("query", "key", "value")], 0)
                out[d + f"attn.proj.{t}"] = sd[s + f"attention.output.dense.{t}"]
                out[d + f"norm2.{t}"] = sd[s + f"layernorm_after.{t}"]
                out[d + f"mlp.fc1.{t}"] = sd[s + f"intermediate.dense.{t}"]
                out[d + f"mlp.fc2.{t}"] = sd[s + f"output.dense.{t}"]
            out[d + "attn.relative_position_bias_table"] = sd[s + "attention.self.relative_position_bias_table"]
            out[d + "attn.relative_position_index"] = sd[s + "attention.self.relative_position_index"]
            used |= {k for k in sd if k.startswith(s)}
            j += 1
        s = f"encoder.layers.{i}.downsample."
        if s + "reduction.weight" in sd:
            d = f"{P}layers.{i}.downsample."
            out[d + "reduction.weight"] = sd[s + "reduction.weight"]
            out[d + "norm.weight"] = sd[s + "norm.weight"]
            out[d + "norm.bias"] = sd[s + "norm.bias"]
            used |= {s + "reduction.weight", s + "norm.weight", s + "norm.bias"}
        out[f"{P}norm{i}.weight"] = sd[f"hidden_states_norms.stage{i + 1}.weight"]
        out[f"{P}norm{i}.bias"] = sd[f"hidden_states_norms.stage{i + 1}.bias"]
        used |= {f"hidden_states_norms.stage{i + 1}.weight", f"hidden_states_norms.stage{i + 1}.bias"}
    left = set(sd) - used
    assert not left, sorted(left)[:5]
    g = torch.Generator().manual_seed(extra_seed)
    for i in range(n_stages):
        c = out[f"{P}norm{i}.weight"].shape[0]
        out[f"neck.lateral.{i}.weight"] = torch.randn(32, c, 1, 1, generator=g) / math.sqrt(c)
        out[f"neck.lateral.{i}.bias"] = 0.1 * torch.randn(32, generator=g)
    out["rpn_head.conv.weight"] = torch.randn(32, 32, 3, 3, generator=g) / math.sqrt(288)
    out["rpn_head.conv.bias"] = 0.1 * torch.randn(32, generator=g)
    out["roi_head.bbox_head.fc_cls.weight"] = torch.randn(9, 64, generator=g) / 8.0
    return out


def run_tf_case(name, cfg, sanity):
    from transformers import SwinBackbone, SwinForImageClassification, SwinModel

    major = cfg["lib"]
    W, H = cfg["size"]
    u8 = make_image(W, H, cfg["seed"])
    x = normalise(u8)  # transformers pads to the patch size itself
    torch.manual_seed(cfg["seed"])
    conf = tf_config(cfg, W, H)
    wrapper = cfg["wrapper"]
    cls = {"model": SwinModel, "classifier": SwinForImageClassification,
           "backbone": SwinBackbone, "detector": SwinBackbone}[wrapper]
    model = cls(conf).eval()
    randomise(model, cfg["seed"])
    out = tf_run(model, x, wrapper)
    geo = tf_geometry(model, out)
    sd = model.state_dict()
    n = len(cfg["depths"])
    layout = "transformers4" if major == "tf4" else "transformers5"
    notes = []
    small_stage = "clamp"
    if wrapper in ("backbone", "detector"):
        small_stage = "pad-up"
    extra = {}
    pad_note = (
        "transformers order per block: layernorm_before, zero-pad bottom/right to a window multiple, "
        "cyclic roll by -shift on the padded map, window attention with the mask built on the padded "
        "grid, roll back, crop (pad-then-shift). The image is padded to the patch size by the library "
        "itself (zero, bottom/right, on the normalised input).")
    clamp_note = (
        "Window rule (no always_partition): if min(stage H, W) <= window then window = min side and "
        "shift = 0 for both axes (square windows only); sizes were chosen so no stage has min side < "
        "window, where the library cannot run without always_partition.")
    pad_up_note = (
        "SwinBackbone always runs the encoder with always_partition=True: window and shift keep the "
        "configured size at every stage, and a stage smaller than the window is padded up to it.")

    if wrapper == "model":
        weights = sd
        notes += [f"SwinModel state_dict, {layout} key names.", pad_note, clamp_note]
    elif wrapper == "classifier":
        weights = sd
        notes += ["SwinForImageClassification state_dict: every backbone key is under 'swin.', and a "
                  "'classifier.*' head (5 labels) is present and must be ignored.", pad_note, clamp_note]
        extra["prefix"] = "swin."
    elif wrapper == "backbone":
        weights = sd
        notes += ["SwinBackbone state_dict (no prefix in 4.x, no final layernorm): per-stage output "
                  "norms hidden_states_norms.stage{i+1}.*; stage{i}_norm is that norm applied to "
                  "stage{i}, exactly the backbone's feature_maps. There is no final_norm output because "
                  "this checkpoint has no final LayerNorm.", pad_note, pad_up_note]
    else:  # detector
        weights = tf_to_original(sd, n, cfg["seed"] + 7)
        layout = "original"
        notes += ["Original (detector-style) layout under 'backbone.': timm-style block names "
                  "(norm1, attn.qkv = concat(q, k, v) on dim 0, attn.proj, "
                  "attn.relative_position_bias_table, norm2, mlp.fc1, mlp.fc2), patch merging at the "
                  "END of stage i (layers.{i}.downsample, i < last), per-stage output norms "
                  "backbone.norm{i}, relative_position_index buffers included as such checkpoints "
                  "carry them, and neck.* / rpn_head.* / roi_head.* tensors that must be ignored.",
                  "Expected values come from a transformers 4.x SwinBackbone with these exact weights "
                  "(converted key by key, values unchanged); stage{i}_norm = backbone.norm{i}(stage{i}). "
                  "No final_norm: the checkpoint has no final LayerNorm.", pad_note, pad_up_note]
        extra["prefix"] = "backbone."
        extra["source_model"] = f"transformers SwinBackbone ({versions(major)}), weights converted"
    write_case(name, cfg, u8, weights, "weights.safetensors", out, geo, layout=layout,
               pad_order="pad-then-shift", small_stage=small_stage, notes=" ".join(notes), extra=extra)
    if sanity:
        report_sanity(name, out, lambda m: tf_run(m, x, wrapper), model)



# --------------------------------------------------------------------------
# OpenMMLab 3.x layout (detection / segmentation toolkits)
# --------------------------------------------------------------------------

def timm_to_original(sd):
    """timm >= 0.9 keys -> the original release's keys (the converter's input): patch
    merging moves from the start of stage i+1 to the end of stage i. The exact inverse of
    the renaming in timm 1.0.31 timm/models/swin_transformer.py checkpoint_filter_fn
    (`layers.(i).downsample -> layers.(i+1).downsample`, `head. -> head.fc.`)."""
    out = {}
    for k, v in sd.items():
        k = re.sub(r"layers\.(\d+)\.downsample", lambda m: f"layers.{int(m.group(1)) - 1}.downsample", k)
        k = k.replace("head.fc.", "head.")
        out[k] = v
    return out


def correct_unfold_reduction_order(x):
    # mmdetection 3.x mmdet/models/backbones/swin.py swin_converter (used by
    # tools/model_converters/swin2mmdet.py); mmsegmentation's swin2mmseg.py has the same.
    out_channel, in_channel = x.shape
    x = x.reshape(out_channel, 4, in_channel // 4)
    x = x[:, [0, 2, 1, 3], :].transpose(1, 2).reshape(out_channel, in_channel)
    return x


def correct_unfold_norm_order(x):
    # Same source as correct_unfold_reduction_order.
    in_channel = x.shape[0]
    x = x.reshape(4, in_channel // 4)
    x = x[[0, 2, 1, 3], :].transpose(0, 1).reshape(in_channel)
    return x


def swin_converter(ckpt):
    """mmdetection 3.x mmdet/models/backbones/swin.py `swin_converter`, the mapping
    tools/model_converters/swin2mmdet.py applies, rewritten line for line."""
    new_ckpt = {}
    for k, v in ckpt.items():
        if k.startswith("head"):
            continue
        elif k.startswith("layers"):
            new_v = v
            if "attn." in k:
                new_k = k.replace("attn.", "attn.w_msa.")
            elif "mlp." in k:
                if "mlp.fc1." in k:
                    new_k = k.replace("mlp.fc1.", "ffn.layers.0.0.")
                elif "mlp.fc2." in k:
                    new_k = k.replace("mlp.fc2.", "ffn.layers.1.")
                else:
                    new_k = k.replace("mlp.", "ffn.")
            elif "downsample" in k:
                new_k = k
                if "reduction." in k:
                    new_v = correct_unfold_reduction_order(v)
                elif "norm." in k:
                    new_v = correct_unfold_norm_order(v)
            else:
                new_k = k
            new_k = new_k.replace("layers", "stages", 1)
        elif k.startswith("patch_embed"):
            new_v = v
            if "proj" in k:
                new_k = k.replace("proj", "projection")
            else:
                new_k = k
        else:
            new_v = v
            new_k = k
        new_ckpt["backbone." + new_k] = new_v
    return new_ckpt


def mm_relative_position_index(wh, ww):
    """The `relative_position_index` buffer of mmdet 3.x WindowMSA (persistent, so it is in
    the toolkit's state_dict): double_step_seq, sum with its transpose, flip(1)."""
    def double_step_seq(step1, len1, step2, len2):
        seq1 = torch.arange(0, step1 * len1, step1)
        seq2 = torch.arange(0, step2 * len2, step2)
        return (seq1[:, None] + seq2[None, :]).reshape(1, -1)
    c = double_step_seq(2 * ww - 1, wh, 1, ww)
    return (c + c.T).flip(1).contiguous()


def timm_to_tf5_backbone(sd, norms, n_stages):
    """timm >= 0.9 keys (+ per-stage norms) -> transformers 5.x SwinBackbone keys."""
    out = {}
    for k, v in sd.items():
        if k.startswith("head."):
            continue
        if k.startswith("patch_embed."):
            out["swin.embeddings." + k[len("patch_embed."):]
                .replace("proj.", "patch_embeddings.projection.")] = v
            continue
        if k.startswith("norm."):
            out["swin.layernorm." + k[len("norm."):]] = v
            continue
        m = re.match(r"layers\.(\d+)\.downsample\.(.*)", k)
        if m:
            out[f"swin.encoder.layers.{int(m.group(1)) - 1}.downsample.{m.group(2)}"] = v
            continue
        m = re.match(r"layers\.(\d+)\.blocks\.(\d+)\.(.*)", k)
        assert m, k
        pre = f"swin.encoder.layers.{m.group(1)}.blocks.{m.group(2)}."
        rest = m.group(3)
        if rest.startswith("attn.qkv."):
            wb = rest[len("attn.qkv."):]
            for q, part in zip(("q_proj", "k_proj", "v_proj"), v.chunk(3, 0)):
                out[pre + f"attention.{q}.{wb}"] = part
            continue
        rest = {"attn.relative_position_bias_table":
                "attention.relative_position_bias.relative_position_bias_table"}.get(rest, rest)
        rest = rest.replace("norm1.", "layernorm_before.").replace("norm2.", "layernorm_after.")
        rest = rest.replace("attn.proj.", "attention.o_proj.")
        out[pre + rest] = v
    for i in range(n_stages):
        for t in ("weight", "bias"):
            out[f"hidden_states_norms.stage{i + 1}.{t}"] = norms[f"norm{i}.{t}"]
    return out


def run_toolkit_case(name, cfg, sanity):
    from transformers import SwinBackbone

    W, H = cfg["size"]
    p = cfg["patch"]
    n = len(cfg["depths"])
    u8 = make_image(W, H, cfg["seed"])
    x = normalise(u8)
    xp = pad_to_patch(x, p)
    torch.manual_seed(cfg["seed"])
    # The reference model: timm 1.0.x with every parameter randomised. always_partition=True
    # keeps the full window (and its (2M-1)^2-row bias table) at every stage, as the toolkit's
    # backbone has; timm would otherwise clamp the small last stage's window at construction.
    tm = timm_build(dict(cfg, always_partition=True), tuple(xp.shape[-2:]))
    randomise(tm, cfg["seed"])
    tsd = {k: v.detach().clone() for k, v in tm.state_dict().items()}
    # Per-stage output norms (the toolkit's norm0..norm{n-1}; timm has none), same rule.
    g = torch.Generator().manual_seed(cfg["seed"] + 1)
    norms = {}
    for i in range(n):
        c = cfg["embed_dim"] * 2 ** i
        norms[f"norm{i}.weight"] = 1.0 + 0.1 * torch.randn(c, generator=g)
        norms[f"norm{i}.bias"] = 0.1 * torch.randn(c, generator=g)

    # Reference features with the toolkit's semantics (pad, then shift; a stage smaller than
    # the window is padded up, window and shift kept): transformers' SwinBackbone.
    model = SwinBackbone(tf_config(cfg, W, H)).eval()
    res = model.load_state_dict(timm_to_tf5_backbone(tsd, norms, n), strict=False)
    assert not res.unexpected_keys, res.unexpected_keys
    assert all("relative_position_index" in k for k in res.missing_keys), res.missing_keys
    out = tf_run(model, x, "backbone")
    # The backbone's forward also runs swin.layernorm; the toolkit's backbone has no final norm.
    out.pop("final_norm", None)
    geo = tf_geometry(model, out)
    # The timm model and the backbone share the patch embedding exactly.
    with torch.no_grad():
        emb_timm = tm.patch_embed(xp)
    assert rel_diff(out["embed"], emb_timm.float()) < 1e-6

    # Re-lay the weights as the toolkit's converter does, then as the toolkit saves a
    # fine-tuned detector: backbone.* (its own buffers, norm0..; no final norm, which the
    # toolkit's backbone does not have), neck and head tensors, nested under `state_dict`.
    sd = swin_converter(timm_to_original(tsd))
    del sd["backbone.norm.weight"], sd["backbone.norm.bias"]
    for k, v in norms.items():
        sd["backbone." + k] = v
    # Every block of the toolkit's model carries this int64 buffer (19 KB at window 7); one
    # block's copy is kept so the pickle holds one, the rest are left out to keep the file small.
    sd["backbone.stages.0.blocks.0.attn.w_msa.relative_position_index"] = \
        mm_relative_position_index(cfg["window"], cfg["window"])
    gh = torch.Generator().manual_seed(cfg["seed"] + 2)
    for i in range(n):
        c = cfg["embed_dim"] * 2 ** i
        sd[f"neck.lateral_convs.{i}.conv.weight"] = torch.randn(16, c, 1, 1, generator=gh) / math.sqrt(c)
        sd[f"neck.lateral_convs.{i}.conv.bias"] = 0.1 * torch.randn(16, generator=gh)
    sd["rpn_head.rpn_conv.weight"] = torch.randn(16, 16, 3, 3, generator=gh) / 12.0
    sd["rpn_head.rpn_conv.bias"] = 0.1 * torch.randn(16, generator=gh)
    sd["roi_head.bbox_head.fc_cls.weight"] = torch.randn(3, 32, generator=gh) / math.sqrt(32)
    sd = {k: v.contiguous().clone() for k, v in sd.items()}
    meta = {
        "note": "made by tests/reference/make_fixtures.py (toolkit3_nested), not by training",
        "epoch": 12,
        "iter": 3000,
        "seed": cfg["seed"],
        "dataset_meta": {"classes": ("seedling", "gap"), "palette": [(220, 20, 60), (0, 82, 0)]},
    }
    weights = {"meta": meta, "state_dict": sd}

    # A small worked example of the converter's permutation (C = 2): the Rust tests undo it.
    ex = torch.arange(16, dtype=torch.float32).reshape(2, 8)
    unfold_example = {
        "timm_order": ex.tolist(),
        "converted": correct_unfold_reduction_order(ex).tolist(),
        "norm_timm_order": ex[0].tolist(),
        "norm_converted": correct_unfold_norm_order(ex[0]).tolist(),
    }
    notes = [
        "Weights: a timm SwinTransformer with every parameter randomised (plus per-stage output "
        "norms norm{i}, randomised with the LayerNorm rule). Re-laid exactly as the OpenMMLab "
        "detection toolkit's converter does (mmdetection 3.x mmdet/models/backbones/swin.py "
        "swin_converter, used by tools/model_converters/swin2mmdet.py): after moving patch "
        "merging to the end of each stage (the original release's layout, the inverse of timm's "
        "checkpoint_filter_fn), `layers` -> `stages`, `attn.` -> `attn.w_msa.`, `mlp.fc1.` -> "
        "`ffn.layers.0.0.`, `mlp.fc2.` -> `ffn.layers.1.`, `patch_embed.proj` -> "
        "`patch_embed.projection`, the merging reduction weight and norm permuted into unfold "
        "order (sub-blocks [0, 2, 1, 3], interleaved), all under `backbone.`.",
        "weights.pth is torch.save of {'meta': ..., 'state_dict': ...} as the toolkit writes a "
        "fine-tuned model: the backbone without a final norm, one relative_position_index buffer "
        "(int64, mmdet's formula; the toolkit's files carry one per block, left out here to keep "
        "the file small), and neck.* / rpn_head.* / roi_head.* tensors to ignore.",
        "Expected values: transformers SwinBackbone loaded with the same weights (qkv split into "
        "q, k, v; hidden_states_norms.stage{i+1} = norm{i}); stage{i}_norm = norm{i}(stage{i}). "
        "Its pad-then-shift order and always_partition (a stage smaller than the window padded up, "
        "shift kept) are what mmdet's ShiftWindowMSA computes (pad to a window multiple, roll, mask "
        "on the padded grid; window and shift never clamped). The timm model's own patch "
        "embedding was checked equal to the backbone's.",
    ]
    extra = {
        "prefix": "backbone.",
        "reference": versions("toolkit"),
        "weights_container": {"format": "torch.save zip pickle", "key": "state_dict", "dtype": "float32"},
        "unfold_example": unfold_example,
    }
    write_case(name, cfg, u8, weights, "weights.pth", out, geo, layout="openmmlab3",
               pad_order="pad-then-shift", small_stage="pad-up", notes=" ".join(notes), extra=extra)
    if sanity:
        report_sanity(name, out, lambda m: tf_run(m, x, "backbone"), model)

# --------------------------------------------------------------------------

def main():
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--lib", choices=["timm", "tf4", "tf5", "toolkit"], required=True)
    ap.add_argument("--case", action="append", help="only these cases (repeatable)")
    ap.add_argument("--sanity", action="store_true", help="also print perturbation sensitivity")
    a = ap.parse_args()

    torch.set_num_threads(2)
    torch.use_deterministic_algorithms(True)
    if a.lib in ("timm", "toolkit"):
        import timm
        assert timm.__version__.startswith("1.0."), timm.__version__
    if a.lib == "toolkit":
        import transformers
        assert transformers.__version__.startswith("5."), transformers.__version__
    elif a.lib != "timm":
        import transformers
        want = "4." if a.lib == "tf4" else "5."
        assert transformers.__version__.startswith(want), transformers.__version__

    os.makedirs(FIXTURES, exist_ok=True)
    names = [n for n, c in CASES.items() if c["lib"] == a.lib and (not a.case or n in a.case)]
    if a.case:
        unknown = set(a.case) - set(names)
        if unknown:
            sys.exit(f"unknown case(s) for --lib {a.lib}: {sorted(unknown)}")
    for name in names:
        cfg = CASES[name]
        if a.lib == "timm":
            run_timm_case(name, cfg, a.sanity)
        elif a.lib == "toolkit":
            run_toolkit_case(name, cfg, a.sanity)
        else:
            run_tf_case(name, cfg, a.sanity)
    write_index()


if __name__ == "__main__":
    main()
