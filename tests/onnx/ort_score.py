"""Scores a CSV file with an exported tidegate ONNX model under ONNX Runtime,
a runtime independent of tidegate, for the integration test tests/it/onnx.rs.

usage: ort_score.py MODEL.onnx INPUT.csv

The graph's inputs and outputs are read from the manifest beside the model
(MODEL.onnx.json). Each input is one [N, 1] column: float columns parse the
CSV text as float32 (empty = NaN, a missing value), string columns pass the
trimmed text. Prints one JSON object: output name -> list of values, plus
"runtime" (the onnxruntime version).
"""

import csv
import json
import sys

import numpy as np
import onnxruntime as ort


def main() -> None:
    model, data = sys.argv[1], sys.argv[2]
    with open(model + ".json", encoding="utf-8") as f:
        manifest = json.load(f)
    with open(data, encoding="utf-8-sig", newline="") as f:
        rows = [r for r in csv.DictReader(f)]
    feed = {}
    for port in manifest["inputs"]:
        name = port["name"]
        texts = [(r.get(name) or "").strip() for r in rows]
        if port["dtype"] == "float":
            values = [float(t) if t else float("nan") for t in texts]
            feed[name] = np.array(values, dtype=np.float32).reshape(-1, 1)
        else:
            feed[name] = np.array(texts, dtype=object).reshape(-1, 1)
    options = ort.SessionOptions()
    options.log_severity_level = 3
    session = ort.InferenceSession(
        model, sess_options=options, providers=["CPUExecutionProvider"]
    )
    names = [o.name for o in session.get_outputs()]
    results = session.run(names, feed)
    out = {"runtime": ort.__version__}
    for name, value in zip(names, results):
        if value.dtype == object:
            out[name] = [str(v) for v in value.tolist()]
        else:
            # NaN or infinity (never expected) becomes null: JSON has neither.
            values = np.asarray(value, dtype=np.float64)
            out[name] = np.where(np.isfinite(values), values, None).tolist()
    json.dump(out, sys.stdout)


if __name__ == "__main__":
    main()
