"""Probe values for the ONNX -> canonical-layout importer test.

Reads a DINOv2 backbone ONNX export with the `onnx` package (independently of
our Rust protobuf reader), maps each tensor to our canonical name and layout
(linear weights transposed to [out, in], position table = class position
followed by the grid), and writes, per canonical tensor: its shape, the float64
sum of its values, and a few (flat index, value) probes at seeded positions.

Usage: python tools/onnx_import_probes.py MODEL.onnx OUTPUT.json
"""

import argparse
import json

import numpy as np
import onnx
from onnx import numpy_helper


def canonical_tensors(model):
    graph = model.graph
    init = {t.name: numpy_helper.to_array(t) for t in graph.initializer}
    by_node = {n.name: n for n in graph.node}

    def weight_of(node_name):
        (name,) = [i for i in by_node[node_name].input if i in init]
        return init[name]

    out = {
        "patch_embed.weight": init["backbone.embeddings.patch_embeddings.projection.weight"],
        "patch_embed.bias": init["backbone.embeddings.patch_embeddings.projection.bias"],
        "cls_token": init["backbone.embeddings.cls_token"],
        "pos_embed": np.concatenate(
            [weight_of("/backbone/embeddings/Concat_6"), weight_of("/backbone/embeddings/Reshape_1")],
            axis=1,
        ),
        "final_norm.weight": init["backbone.layernorm.weight"],
        "final_norm.bias": init["backbone.layernorm.bias"],
    }
    layer = 0
    while f"backbone.encoder.layer.{layer}.norm1.weight" in init:
        src, node, dst = f"backbone.encoder.layer.{layer}", f"/backbone/encoder/layer.{layer}", f"blocks.{layer}"
        for ours, theirs in [
            ("norm1.weight", "norm1.weight"),
            ("norm1.bias", "norm1.bias"),
            ("norm2.weight", "norm2.weight"),
            ("norm2.bias", "norm2.bias"),
            ("attn.q.bias", "attention.attention.query.bias"),
            ("attn.k.bias", "attention.attention.key.bias"),
            ("attn.v.bias", "attention.attention.value.bias"),
            ("attn.out.bias", "attention.output.dense.bias"),
            ("mlp.fc1.bias", "mlp.fc1.bias"),
            ("mlp.fc2.bias", "mlp.fc2.bias"),
            ("ls1", "layer_scale1.lambda1"),
            ("ls2", "layer_scale2.lambda1"),
        ]:
            out[f"{dst}.{ours}"] = init[f"{src}.{theirs}"]
        for ours, matmul in [
            ("attn.q.weight", "attention/attention/query/MatMul"),
            ("attn.k.weight", "attention/attention/key/MatMul"),
            ("attn.v.weight", "attention/attention/value/MatMul"),
            ("attn.out.weight", "attention/output/dense/MatMul"),
            ("mlp.fc1.weight", "mlp/fc1/MatMul"),
            ("mlp.fc2.weight", "mlp/fc2/MatMul"),
        ]:
            # MatMul computes x @ W with W stored [in, out]; ours is [out, in].
            out[f"{dst}.{ours}"] = weight_of(f"{node}/{matmul}").T
        layer += 1
    return out


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("model")
    parser.add_argument("output")
    parser.add_argument("--probes", type=int, default=4)
    args = parser.parse_args()

    tensors = canonical_tensors(onnx.load(args.model))
    rng = np.random.default_rng(20240601)
    result = {}
    for name in sorted(tensors):
        values = np.ascontiguousarray(tensors[name], dtype=np.float32).reshape(-1)
        picks = sorted(set(rng.integers(0, values.size, size=args.probes).tolist()))
        result[name] = {
            "shape": list(tensors[name].shape),
            "sum": float(values.astype(np.float64).sum()),
            "probes": [[i, float(values[i])] for i in picks],
        }
    with open(args.output, "w") as f:
        json.dump(result, f, indent=None, separators=(",", ":"))
        f.write("\n")


if __name__ == "__main__":
    main()
