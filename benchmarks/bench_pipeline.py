"""Benchmark of the per-window chain and fast replay for each demo model.

Run: .venv/bin/python benchmarks/bench_pipeline.py   (figures go in the README)
"""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from monitor.assembly.plan import ModelPlan  # noqa: E402
from monitor.cli.bench import run_bench  # noqa: E402

if __name__ == "__main__":
    models = sys.argv[1:] or ["models/demo.tflite", "models/demo.int8.tflite", "models/demo.keras"]
    for m in models:
        run_bench(ModelPlan(Path(m)))
        print()
