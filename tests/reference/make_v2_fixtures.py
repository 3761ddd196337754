"""Swin V2 reference fixtures from timm and transformers 5.x.

One environment holds both libraries (requirements-padding.txt: torch 2.15.0,
timm 1.0.31, transformers 5.23.0):

    python tests/reference/make_v2_fixtures.py [--case NAME]

Writes tests/fixtures/<case>/ exactly like make_fixtures.py (input.png, the
library's own weights, expected.safetensors, case.json) and re-writes
tests/fixtures/cases.json with every case of both scripts. Nothing expected is
typed by hand: every value comes from running the library.

Every parameter is randomised so that each V2 branch shapes the output:
logit scales ln(10) + 0.5 N(0,1) (the clamp at ln(100) is checked by a unit
test instead: at a scale of 100 the library's float32 output is itself 1e-4
from float64); continuous position bias MLP weights N(0, 1/fan_in)
(second layer x2, so 16 sigmoid(.) spans most of (0, 16)); q and v biases
0.5 N(0,1); LayerNorms 1 + 0.1 N(0,1) / 0.1 N(0,1); other linear layers as in
make_fixtures.py.
"""
import argparse
import copy
import json
import math
import os
import sys

import torch
import torch.nn as nn
from safetensors.torch import save_file

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import make_fixtures as mf  # noqa: E402

V2_CASES = {
    "timmv2_multiple": dict(
        lib="timm", size=(128, 128), embed_dim=8, depths=[2, 2, 2, 2], heads=[1, 2, 2, 4],
        window=8, patch=4, mlp_ratio=2.0, seed=501, trained=[0, 0, 0, 0]),
    "timmv2_odd": dict(
        lib="timm", size=(150, 115), embed_dim=8, depths=[2, 2, 2], heads=[2, 2, 4],
        window=8, patch=4, mlp_ratio=2.0, seed=502, trained=[0, 0, 0]),
    "timmv2_trained_window": dict(
        lib="timm", size=(136, 104), embed_dim=8, depths=[2, 2, 2], heads=[1, 2, 2],
        window=8, patch=4, mlp_ratio=2.0, seed=503, trained=[6, 6, 4], timm_config=True),
    "tfv2_backbone_odd": dict(
        lib="tf5", size=(101, 77), embed_dim=8, depths=[2, 2, 2, 2], heads=[1, 2, 2, 4],
        window=8, patch=4, mlp_ratio=2.0, seed=601, trained=[0, 0, 0, 0], image_size=64,
        wrapper="backbone"),
    "tfv2_model_trained_window": dict(
        lib="tf5", size=(112, 96), embed_dim=8, depths=[2, 2, 2], heads=[1, 2, 4],
        window=6, patch=4, mlp_ratio=2.0, seed=602, trained=[8, 4, 4], image_size=96,
        wrapper="model"),
    "tfv2_classifier_eps": dict(
        lib="tf5", size=(90, 70), embed_dim=8, depths=[2, 2, 2], heads=[1, 2, 4],
        window=6, patch=4, mlp_ratio=2.0, seed=603, trained=[8, 4, 4], image_size=96,
        wrapper="classifier", layer_norm_eps=1e-6),
}

CPB_NAMES = ("cpb_mlp", "continuous_position_bias_mlp")


@torch.no_grad()
def randomise_v2(model, seed):
    g = torch.Generator().manual_seed(seed)

    def n(shape):
        return torch.randn(shape, generator=g, dtype=torch.float32)

    done = set()
    for mname, mod in model.named_modules():
        for pname, p in mod.named_parameters(recurse=False):
            full = f"{mname}.{pname}" if mname else pname
            if isinstance(mod, nn.LayerNorm):
                val = 1.0 + 0.1 * n(p.shape) if pname == "weight" else 0.1 * n(p.shape)
            elif pname == "logit_scale":
                # Moved off its init, but not up to the clamp: at a scale of 100 the library's
                # own float32 output is 1e-4 away from float64, so no float32 port could be held
                # to 1e-5 there (README.md, "Swin V2 cases").
                val = math.log(10.0) + 0.5 * n(p.shape)
            elif pname in ("q_bias", "v_bias"):
                val = 0.5 * n(p.shape)
            elif isinstance(mod, (nn.Linear, nn.Conv2d)):
                if pname == "weight":
                    val = n(p.shape) / math.sqrt(p[0].numel())
                    if any(c in mname for c in CPB_NAMES) and mname.endswith(".2"):
                        val = 2.0 * val
                else:
                    val = 0.1 * n(p.shape)
            else:
                raise RuntimeError(f"no randomisation rule for {full} ({type(mod).__name__})")
            p.copy_(val)
            done.add(full)
    missing = [k for k, _ in model.named_parameters() if k not in done]
    if missing:
        raise RuntimeError(f"parameters left at library init: {missing[:5]}")


def geometry(stages, grids, win_shift):
    geo = []
    for i, blocks in enumerate(win_shift):
        h, w = grids[i]
        win = blocks[0]["window"]
        shift = [max(bl["shift"][a] for bl in blocks) for a in range(2)]
        for bl in blocks:
            bl["padded"] = [math.ceil(h / bl["window"][0]) * bl["window"][0],
                            math.ceil(w / bl["window"][1]) * bl["window"][1]]
        geo.append({"grid": [h, w], "window": win, "shift": shift,
                    "padded": blocks[0]["padded"], "blocks": blocks})
    return geo


def float64_run(model, x, run):
    """The expected values: the library's forward in float64 (same float32 weights, input cast),
    stored as float32. V2's post-norm blocks make float32 rounding grow about ten times as much
    as in V1 (the library's own float32 run lands 2e-6 to 1e-5 from float64 on these cases), so
    a float32 reference would eat most of the 1e-5 budget by itself. Returns the outputs and the
    library's float32 distance from them per output, which case.json records."""
    out32 = run(model, x)
    out64 = run(copy.deepcopy(model).double(), x.double())
    out = {k: v.float().contiguous() for k, v in out64.items()}
    gap = {k: float(f"{mf.rel_diff(out32[k].double(), out64[k].double()):.2e}") for k in out}
    print("    library float32 vs float64:", gap)
    return out, gap


# --------------------------------------------------------------------------
# timm SwinTransformerV2
# --------------------------------------------------------------------------

def timm_v2_build(cfg, img_hw):
    from timm.models.swin_transformer_v2 import SwinTransformerV2

    return SwinTransformerV2(
        img_size=img_hw, patch_size=cfg["patch"], in_chans=3, num_classes=8,
        embed_dim=cfg["embed_dim"], depths=tuple(cfg["depths"]), num_heads=tuple(cfg["heads"]),
        window_size=cfg["window"], mlp_ratio=cfg["mlp_ratio"], qkv_bias=True,
        drop_rate=0.0, proj_drop_rate=0.0, attn_drop_rate=0.0, drop_path_rate=0.0,
        pretrained_window_sizes=tuple(cfg["trained"]),
    ).eval()


def write_timm_config(name, cfg, img_hw):
    """The config.json timm writes beside exported weights (timm 1.0.31, save_config_for_hf),
    for the same shape, as `timm_config.json` in the case folder: a test copies it beside the
    weights as config.json and runs without --config. The architecture is a published V2 name;
    model_args carry this case's shape."""
    import timm
    from timm.models._hub import save_config_for_hf

    model = timm.create_model(
        "swinv2_tiny_window8_256", pretrained=False, img_size=img_hw, patch_size=cfg["patch"],
        num_classes=8, embed_dim=cfg["embed_dim"], depths=tuple(cfg["depths"]),
        num_heads=tuple(cfg["heads"]), window_size=cfg["window"], mlp_ratio=cfg["mlp_ratio"],
        pretrained_window_sizes=tuple(cfg["trained"]))
    save_config_for_hf(model, os.path.join(mf.FIXTURES, name, "timm_config.json"))


def run_timm_v2(name, cfg):
    W, H = cfg["size"]
    p = cfg["patch"]
    u8 = mf.make_image(W, H, cfg["seed"])
    x = mf.pad_to_patch(mf.normalise(u8), p)
    hp, wp = x.shape[-2:]
    torch.manual_seed(cfg["seed"])
    model = timm_v2_build(cfg, (hp, wp))
    randomise_v2(model, cfg["seed"])
    out, gap = float64_run(model, x, mf.timm_run)
    grids = [tuple(out[f"stage{i}"].shape[1:3]) for i in range(len(cfg["depths"]))]
    for i, layer in enumerate(model.layers):
        assert list(layer.blocks[0].input_resolution) == list(grids[i])
    ws = [[{"window": list(b.window_size), "shift": list(b.shift_size)} for b in layer.blocks]
          for layer in model.layers]
    geo = geometry(model.layers, grids, ws)
    notes = [
        "timm SwinTransformerV2 state_dict (timm >= 0.9 layout: layers.{i}.downsample starts stage "
        "i; attn.q_bias, attn.v_bias (no k bias), attn.logit_scale [heads,1,1], attn.cpb_mlp.0/2), "
        "classifier head.fc.* included.",
        "V2 block: x + norm1(attn(x)), then x + norm2(mlp(x)); cosine attention times "
        "exp(min(logit_scale, ln 100)); bias 16 sigmoid(cpb_mlp(log-spaced coordinates)) with the "
        "coordinates of the block's own (clamped) window divided by (trained window - 1) where "
        "pretrained_window_sizes is set, else by (window - 1); patch merging: reduction, then "
        "LayerNorm(2C).",
        "timm pads and shifts like V1 (shift-then-pad, per-axis clamp of the window on small stages).",
    ]
    if (hp, wp) != (H, W):
        notes.append(f"the normalised input was zero-padded bottom/right to {wp}x{hp} (W x H) for timm, "
                     "whose conv would drop the remainder; the model was built with that img_size.")
    override = {"window": cfg["window"]}
    if any(cfg["trained"]):
        override["trained_window"] = cfg["trained"]
    mf.write_case(name, cfg, u8, model.state_dict(), "weights.safetensors", out, geo, layout="timm",
                  pad_order="shift-then-pad", small_stage="clamp-per-axis", notes=" ".join(notes),
                  extra={"family": "v2", "override": override,
                         "pretrained_window_sizes": cfg["trained"], "precision": precision(gap)})
    if cfg.get("timm_config"):
        write_timm_config(name, cfg, (hp, wp))


def precision(gap):
    return {"expected": "the library's forward in float64, stored as float32",
            "library_float32_rel_diff": gap}


# --------------------------------------------------------------------------
# transformers 5.x Swinv2Model / Swinv2Backbone, saved as a folder
# --------------------------------------------------------------------------

@torch.no_grad()
def run_tf_v2(name, cfg):
    from transformers import Swinv2Backbone, Swinv2Config, Swinv2ForImageClassification, Swinv2Model

    W, H = cfg["size"]
    u8 = mf.make_image(W, H, cfg["seed"])
    x = mf.normalise(u8)  # transformers pads to the patch size itself
    n = len(cfg["depths"])
    conf = Swinv2Config(
        image_size=cfg["image_size"], patch_size=cfg["patch"], num_channels=3,
        embed_dim=cfg["embed_dim"], depths=cfg["depths"], num_heads=cfg["heads"],
        window_size=cfg["window"], pretrained_window_sizes=cfg["trained"],
        mlp_ratio=cfg["mlp_ratio"], qkv_bias=True, hidden_dropout_prob=0.0,
        attention_probs_dropout_prob=0.0, drop_path_rate=0.0, hidden_act="gelu",
        use_absolute_embeddings=False, layer_norm_eps=cfg.get("layer_norm_eps", 1e-5),
        out_features=[f"stage{i + 1}" for i in range(n)],
        **({"num_labels": 3} if cfg["wrapper"] == "classifier" else {}),
    )
    torch.manual_seed(cfg["seed"])
    cls = {"backbone": Swinv2Backbone, "model": Swinv2Model,
           "classifier": Swinv2ForImageClassification}[cfg["wrapper"]]
    model = cls(conf).eval()
    randomise_v2(model, cfg["seed"])
    grids = []

    def run(m, x):
        res_model = m
        m = getattr(m, "swinv2", m)  # the classifier keeps the model under `swinv2.`
        rec = {}
        hooks = [m.embeddings.register_forward_hook(lambda _m, i, o: rec.__setitem__("embed", o))]
        for i, stage in enumerate(m.encoder.layers):
            # A stage returns (hidden_states, hidden_states_before_downsampling, output_dimensions).
            hooks.append(stage.register_forward_hook(
                lambda _m, i_, o, i=i: rec.__setitem__(f"stage{i}", o)))
        res = res_model(pixel_values=x)
        for hk in hooks:
            hk.remove()
        emb, dims = rec["embed"]
        out = {"embed": emb.reshape(1, *dims, -1).clone()}
        grids.clear()
        for i in range(n):
            _, before, od = rec[f"stage{i}"]
            grids.append((int(od[0]), int(od[1])))
            out[f"stage{i}"] = before.reshape(1, *grids[-1], -1).clone()
        if cfg["wrapper"] == "backbone":
            for i, fm in enumerate(res.feature_maps):
                assert torch.equal(fm.permute(0, 2, 3, 1).contiguous(), out[f"stage{i}"]), i
        elif cfg["wrapper"] == "model":
            last = out[f"stage{n - 1}"]
            out["final_norm"] = res.last_hidden_state.reshape(1, *last.shape[1:3], -1).clone()
        return out

    out, gap = float64_run(model, x, run)
    enc = getattr(model, "swinv2", model).encoder
    ws = [[{"window": [int(b.window_size)] * 2, "shift": [int(b.shift_size)] * 2} for b in stage.blocks]
          for stage in enc.layers]
    geo = geometry(enc.layers, grids, ws)

    d = os.path.join(mf.FIXTURES, name)
    os.makedirs(d, exist_ok=True)
    for f in os.listdir(d):
        os.remove(os.path.join(d, f))
    notes = [
        f"{cls.__name__} saved with save_pretrained: model.safetensors and config.json side by side "
        "(transformers 5.x Swinv2 keeps the 4.x key names: attention.self.query/key/value, "
        "logit_scale, continuous_position_bias_mlp.0/2; no key bias).",
        f"Windows are fixed when the model is built, from config.image_size = {cfg['image_size']}: "
        "stage i's construction grid is (image_size // patch) // 2^i; when it is not larger than "
        "window_size the stage gets that grid as its window and no shift, whatever the input size. "
        "At run time every stage is zero-padded to its window multiple, then rolled "
        "(pad-then-shift); the shift mask is added twice in Swinv2SelfAttention (-200 across regions).",
    ]
    if cfg["wrapper"] == "backbone":
        notes.append("Swinv2Backbone has no per-stage output norms and no final layernorm: its "
                     "feature_maps are the stage outputs before patch merging (checked equal to stage{i}).")
    elif cfg["wrapper"] == "model":
        notes.append("final_norm is Swinv2Model's layernorm on the last stage (last_hidden_state).")
    else:
        notes.append("Swinv2ForImageClassification: every backbone key under 'swinv2.', a "
                     "'classifier.*' head (3 labels) to ignore; layer_norm_eps 1e-6 in config.json "
                     "(the blocks' and the final norm's; the patch embedding and merging norms keep "
                     "1e-5). The final norm's output is pooled by the classifier and not stored.")
    extra = {"family": "v2", "pretrained_window_sizes": cfg["trained"], "precision": precision(gap),
             "config_json": "config.json", "image_size_built_for": cfg["image_size"]}
    # write_case clears the folder; the library's own files are written after it.
    mf.write_case(name, cfg, u8, {}, "model.safetensors", out, geo, layout="transformers4",
                  pad_order="pad-then-shift", small_stage="as-built", notes=" ".join(notes),
                  extra=extra)
    os.remove(os.path.join(d, "model.safetensors"))
    with open(os.path.join(d, "case.json")) as f:
        case = json.load(f)
    case["config"]["layer_norm_eps"] = conf.layer_norm_eps
    with open(os.path.join(d, "case.json"), "w") as f:
        f.write(mf.dump_json(case))
    model.save_pretrained(d)
    keys = set(model.state_dict())
    from safetensors import safe_open
    with safe_open(os.path.join(d, "model.safetensors"), "pt") as f:
        assert set(f.keys()) == keys, sorted(set(f.keys()) ^ keys)[:5]


def main():
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--case", action="append", help="only these cases (repeatable)")
    a = ap.parse_args()
    torch.set_num_threads(2)
    torch.use_deterministic_algorithms(True)
    import timm
    import transformers
    assert timm.__version__ == "1.0.31", timm.__version__
    assert transformers.__version__ == "5.23.0", transformers.__version__
    names = [nm for nm in V2_CASES if not a.case or nm in a.case]
    for nm in names:
        cfg = V2_CASES[nm]
        (run_timm_v2 if cfg["lib"] == "timm" else run_tf_v2)(nm, cfg)
    mf.write_index()


if __name__ == "__main__":
    main()
