"""Reference hidden states of a DINOv2 backbone ONNX export, from onnxruntime.

Cuts the graph at the backbone's final LayerNorm (its output becomes the only
graph output, so any head after it is not run), runs onnxruntime on the CPU on
a preprocessed float32 batch [B, 3, H, W] read from a .npy file, and saves the
hidden states [B, 1 + N, D] as float32 .npy.

Usage: python tools/onnx_reference.py MODEL.onnx INPUT.npy OUTPUT.npy [--threads N]

Needs only numpy, onnx and onnxruntime.
"""

import argparse
import sys

import numpy as np
import onnx
import onnxruntime as ort

HIDDEN_STATES = "/backbone/layernorm/Add_1_output_0"


def backbone_only(model, output_name):
    """The model with `output_name` as its single output."""
    produced = {out for node in model.graph.node for out in node.output}
    if output_name not in produced:
        raise SystemExit(f"error: no node of the graph produces {output_name}")
    del model.graph.output[:]
    model.graph.output.append(
        onnx.helper.make_tensor_value_info(output_name, onnx.TensorProto.FLOAT, None)
    )
    return model


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("model", help="ONNX file")
    parser.add_argument("input", help=".npy float32 [B, 3, H, W], already preprocessed")
    parser.add_argument("output", help=".npy to write, float32 [B, 1 + N, D]")
    parser.add_argument("--threads", type=int, default=1, help="intra-op threads (default 1)")
    parser.add_argument("--output-name", default=HIDDEN_STATES, help="graph value to return")
    args = parser.parse_args()

    batch = np.load(args.input)
    if batch.ndim != 4 or batch.shape[1] != 3:
        raise SystemExit(f"error: {args.input} has shape {batch.shape}, expected [B, 3, H, W]")
    batch = np.ascontiguousarray(batch, dtype=np.float32)

    model = backbone_only(onnx.load(args.model), args.output_name)
    options = ort.SessionOptions()
    options.intra_op_num_threads = args.threads
    options.inter_op_num_threads = 1
    session = ort.InferenceSession(
        model.SerializeToString(), options, providers=["CPUExecutionProvider"]
    )
    input_name = session.get_inputs()[0].name
    (hidden,) = session.run([args.output_name], {input_name: batch})
    np.save(args.output, np.asarray(hidden, dtype=np.float32))
    print(f"{args.output}: {hidden.shape} float32", file=sys.stderr)


if __name__ == "__main__":
    main()
