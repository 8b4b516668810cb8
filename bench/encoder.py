"""Encoder throughput: our forward pass vs onnxruntime on the same graph.

Alternates the two, several rounds, and prints medians with the fraction of
this CPU's measured SGEMM peak that each reaches. The default model costs
about 12.25 GFLOP per 224x224 image (257 tokens), the figure the project
measured; we recompute it below from the architecture.

usage: python bench/encoder.py VITRINE_BIN_DIR MODEL_DIR ONNX_FILE [ROUNDS]
"""
import json
import statistics
import subprocess
import sys
import time

import numpy as np
import onnx
import onnxruntime as ort

bin_dir, model_dir, onnx_path = sys.argv[1:4]
rounds = int(sys.argv[4]) if len(sys.argv) > 4 and sys.argv[4] else 3
ours_bin = f"{bin_dir}/examples/encoder_throughput"


def flops_per_image(d=384, layers=12, mlp=1536, tokens=257, patch=14, channels=3):
    """Multiply-adds x 2 of the ViT forward pass (matmuls and attention)."""
    patch_embed = (tokens - 1) * d * channels * patch * patch
    per_layer = tokens * d * 3 * d + tokens * d * d + 2 * tokens * d * mlp + 2 * tokens * tokens * d
    return 2 * (patch_embed + layers * per_layer)


def ours(threads, batch):
    out = subprocess.run(
        [ours_bin, "--model", model_dir, "--threads", str(threads), "--batch", str(batch),
         "--iterations", str(max(2, 16 // batch))],
        check=True, capture_output=True, text=True)
    return json.loads(out.stdout)["images_per_s"]


def gemm_peak(threads):
    out = subprocess.run([ours_bin, "--gemm-peak", "--threads", str(threads)],
                         check=True, capture_output=True, text=True)
    return json.loads(out.stdout)["sgemm_gflops"]


model = onnx.load(onnx_path)
hidden = "/backbone/layernorm/Add_1_output_0"
del model.graph.output[:]
model.graph.output.append(onnx.helper.make_tensor_value_info(hidden, onnx.TensorProto.FLOAT, None))
serialized = model.SerializeToString()
sessions = {}


def onnxruntime_rate(threads, batch):
    if threads not in sessions:
        options = ort.SessionOptions()
        options.intra_op_num_threads = threads
        options.inter_op_num_threads = 1
        sessions[threads] = ort.InferenceSession(serialized, options, providers=["CPUExecutionProvider"])
    session = sessions[threads]
    x = np.random.default_rng(0).standard_normal((batch, 3, 224, 224), dtype=np.float32)
    session.run([hidden], {"input_image": x})
    iterations = max(2, 16 // batch)
    started = time.perf_counter()
    for _ in range(iterations):
        session.run([hidden], {"input_image": x})
    return batch * iterations / (time.perf_counter() - started)


gflop = flops_per_image() / 1e9
peaks = {t: statistics.median(gemm_peak(t) for _ in range(3)) for t in (1, 2)}
rows = []
for threads in (1, 2):
    for batch in (1, 16):
        ours_rates, ort_rates = [], []
        for _ in range(rounds):
            ours_rates.append(ours(threads, batch))
            ort_rates.append(onnxruntime_rate(threads, batch))
        rows.append((threads, batch, statistics.median(ours_rates), statistics.median(ort_rates)))

print(f"Encoder forward pass, default model (DINOv2 ViT-S/14, 224 px, {gflop:.2f} GFLOP/image); "
      f"medians of {rounds} alternating rounds")
print(f"measured SGEMM peak: {peaks[1]:.1f} GFLOP/s (1 thread), {peaks[2]:.1f} GFLOP/s (2 threads)")
print()
print("| threads | batch | vitrine img/s | onnxruntime img/s | ratio | vitrine % of peak | onnxruntime % of peak |")
print("|---:|---:|---:|---:|---:|---:|---:|")
for threads, batch, o, r in rows:
    print(f"| {threads} | {batch} | {o:.2f} | {r:.2f} | {o / r:.2f}x | "
          f"{100 * o * gflop / peaks[threads]:.0f}% | {100 * r * gflop / peaks[threads]:.0f}% |")
