"""Print state_dict keys and shapes of a tiny Swin (2 stages, depth 2 each)
for one library, so the key layout can be documented in KEYS.md.

Usage: python tests/reference/dump_keys.py --lib timm|tf4|tf5|v2
"""
import argparse

import torch


def tiny_timm():
    import timm

    m = timm.create_model(
        "swin_tiny_patch4_window7_224", pretrained=False, img_size=56,
        embed_dim=16, depths=(2, 2), num_heads=(1, 2), window_size=7, num_classes=10,
    )
    return {"timm SwinTransformer": m}


def tiny_tf():
    from transformers import SwinBackbone, SwinConfig, SwinForImageClassification, SwinModel

    cfg = SwinConfig(image_size=56, embed_dim=16, depths=[2, 2], num_heads=[1, 2],
                     window_size=7, num_labels=10, out_features=["stage1", "stage2"])
    return {
        "SwinModel": SwinModel(cfg),
        "SwinForImageClassification": SwinForImageClassification(cfg),
        "SwinBackbone": SwinBackbone(cfg),
    }


def tiny_v2():
    """Swin V2 in both libraries (one environment: requirements-padding.txt)."""
    from timm.models.swin_transformer_v2 import SwinTransformerV2
    from transformers import Swinv2Backbone, Swinv2Config, Swinv2Model

    cfg = Swinv2Config(image_size=64, embed_dim=16, depths=[2, 2], num_heads=[1, 2],
                       window_size=8, out_features=["stage1", "stage2"])
    return {
        "timm SwinTransformerV2": SwinTransformerV2(
            img_size=64, embed_dim=16, depths=(2, 2), num_heads=(1, 2), window_size=8,
            num_classes=10),
        "Swinv2Model": Swinv2Model(cfg),
        "Swinv2Backbone": Swinv2Backbone(cfg),
    }


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--lib", choices=["timm", "tf4", "tf5", "v2"], required=True)
    a = ap.parse_args()
    if a.lib == "v2":
        import timm
        import transformers
        print(f"# timm {timm.__version__}, transformers {transformers.__version__}, torch {torch.__version__}")
        models = tiny_v2()
    elif a.lib == "timm":
        import timm
        print(f"# timm {timm.__version__}, torch {torch.__version__}")
        models = tiny_timm()
    else:
        import transformers
        print(f"# transformers {transformers.__version__}, torch {torch.__version__}")
        models = tiny_tf()
    for name, m in models.items():
        sd = m.state_dict()
        persistent = set(sd)
        bufs = [n for n, _ in m.named_buffers()]
        print(f"\n## {name}: {len(sd)} state_dict entries")
        for k, v in sd.items():
            print(f"{k} {list(v.shape)} {str(v.dtype).replace('torch.', '')}")
        nonpersist = [b for b in bufs if b not in persistent]
        print(f"\n# buffers NOT in state_dict ({len(nonpersist)}):")
        for b in nonpersist:
            print(f"#   {b}")


if __name__ == "__main__":
    main()
