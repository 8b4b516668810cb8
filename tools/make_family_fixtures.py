#!/usr/bin/env python3
"""Builds the reference fixtures for crates/vitrine-model/tests/families_vs_transformers.rs.

For each published ViT family this makes a tiny, randomly initialised model with
transformers' own modules, saves it with `save_pretrained` (so the tensor names
are exactly what published checkpoints carry), runs it on fixed inputs and stores
the outputs. The Rust test only reads the committed files; CI needs no torch.

Needs torch and transformers (CPU is enough):
    pip install torch transformers
    python tools/make_family_fixtures.py

Output, under crates/vitrine-model/tests/fixtures/families/:
    inputs.safetensors             pixels: `square` [2, 3, 32, 32], `non_square` [2, 3, 40, 24]
    versions.json                  torch and transformers versions used
    <family>/model.safetensors     the checkpoint as saved by transformers
    <family>/config.json           its config as saved by transformers
    <family>/reference.safetensors `{input}.last_hidden_state`, `{input}.pooled`

`pooled` is the final-normed class token (ViT, DINOv2: last_hidden_state[:, 0])
or, for CLIP, `image_embeds` (post_layernorm + visual_projection).
The references are computed in float64 from the float32 weights, so they hold the
exact result the stored weights define.
"""

import json
import math
import shutil
from pathlib import Path

import torch
import transformers
from safetensors.torch import save_file
from transformers import (
    CLIPVisionConfig,
    CLIPVisionModelWithProjection,
    Dinov2Config,
    Dinov2Model,
    Dinov2WithRegistersConfig,
    Dinov2WithRegistersModel,
    ViTConfig,
    ViTModel,
)

OUT = Path(__file__).resolve().parent.parent / "crates/vitrine-model/tests/fixtures/families"
IMAGE_SIZE = 32
# Non-square and not the training size: forces bicubic position interpolation,
# upsampling the grid along the height and downsampling it along the width.
NON_SQUARE = (40, 24)


def families():
    common = dict(
        num_hidden_layers=2,
        num_attention_heads=4,
        image_size=IMAGE_SIZE,
        attn_implementation="eager",
    )
    return {
        "vit": (
            ViTModel,
            ViTConfig(hidden_size=32, intermediate_size=64, patch_size=8, **common),
        ),
        "dinov2": (
            Dinov2Model,
            Dinov2Config(hidden_size=48, mlp_ratio=2, patch_size=4, **common),
        ),
        "dinov2_registers": (
            Dinov2WithRegistersModel,
            Dinov2WithRegistersConfig(
                hidden_size=32, mlp_ratio=2, patch_size=8, num_register_tokens=4, **common
            ),
        ),
        "clip": (
            CLIPVisionModelWithProjection,
            CLIPVisionConfig(
                hidden_size=48,
                intermediate_size=96,
                patch_size=8,
                projection_dim=16,
                hidden_act="quick_gelu",
                **common,
            ),
        ),
    }


def randomise(model: torch.nn.Module, generator: torch.Generator) -> None:
    """Replaces the library's initialisation (tiny weights, unit norms, zero tokens)
    with values large enough that a misplaced norm, scale or token shows."""

    def normal(shape, std):
        return torch.randn(shape, generator=generator) * std

    with torch.no_grad():
        for name, param in model.named_parameters():
            shape = param.shape
            leaf = name.rsplit(".", 1)[-1]
            is_norm = "norm" in name or "layrnorm" in name
            if leaf == "lambda1":
                value = 0.5 + torch.rand(shape, generator=generator)
            elif is_norm and leaf == "weight":
                value = 1.0 + normal(shape, 0.3)
            elif is_norm and leaf == "bias":
                value = normal(shape, 0.2)
            elif leaf == "bias":
                value = normal(shape, 0.1)
            elif "token" in name or "position" in name or "class_embedding" in name:
                value = normal(shape, 0.5)
            else:
                # linear and patch-convolution weights, [out, in, ...]
                fan_in = math.prod(shape[1:])
                value = normal(shape, 1.0 / math.sqrt(fan_in))
            param.copy_(value)


def run(name: str, model, pixels: torch.Tensor, interpolate: bool):
    kwargs = {}
    if name in ("vit", "clip") and interpolate:
        # DINOv2 always interpolates; ViT and CLIP must be asked to.
        kwargs["interpolate_pos_encoding"] = True
    with torch.no_grad():
        out = model(pixel_values=pixels.double(), **kwargs)
    hidden = out.last_hidden_state
    pooled = out.image_embeds if name == "clip" else hidden[:, 0]
    return hidden.float().contiguous(), pooled.float().contiguous()


def main() -> None:
    torch.manual_seed(0)
    if OUT.exists():
        shutil.rmtree(OUT)
    OUT.mkdir(parents=True)

    inputs_generator = torch.Generator().manual_seed(1234)
    inputs = {
        "square": torch.randn(2, 3, IMAGE_SIZE, IMAGE_SIZE, generator=inputs_generator),
        "non_square": torch.randn(2, 3, *NON_SQUARE, generator=inputs_generator),
    }
    save_file(inputs, OUT / "inputs.safetensors")

    for index, (name, (model_class, config)) in enumerate(families().items()):
        model = model_class(config).eval()
        randomise(model, torch.Generator().manual_seed(100 + index))
        family_dir = OUT / name
        model.save_pretrained(family_dir)

        reference_model = model.double()
        reference = {}
        for input_name, pixels in inputs.items():
            hidden, pooled = run(name, reference_model, pixels, input_name != "square")
            reference[f"{input_name}.last_hidden_state"] = hidden
            reference[f"{input_name}.pooled"] = pooled
        save_file(reference, family_dir / "reference.safetensors")

    versions = {
        "torch": torch.__version__,
        "transformers": transformers.__version__,
        "attention": "eager",
        "reference_dtype": "float64",
    }
    (OUT / "versions.json").write_text(json.dumps(versions, indent=2) + "\n")
    total = sum(p.stat().st_size for p in OUT.rglob("*") if p.is_file())
    print(f"wrote {OUT} ({total / 1024:.0f} KiB)")


if __name__ == "__main__":
    main()
