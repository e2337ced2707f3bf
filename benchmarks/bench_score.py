"""Audio hours scored per minute by `scenemon score` with 1 and 2 local workers and on a
Dask LocalCluster of 2 worker processes, on an archive of tour copies.

Run: .venv/bin/python benchmarks/bench_score.py [--files 16]
"""

import argparse
import shutil
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--files", type=int, default=16)
    ap.add_argument("--model", default=str(ROOT / "models" / "demo.tflite"))
    args = ap.parse_args()
    from monitor.demo.tour import ensure_tour
    from monitor.review.score import run_score

    wav, tsv = ensure_tour(ROOT / "recordings" / "demo")
    with tempfile.TemporaryDirectory() as td:
        arch = Path(td) / "archive"
        arch.mkdir()
        for k in range(args.files):
            shutil.copy(wav, arch / f"walk{k:03d}.wav")
            shutil.copy(tsv, arch / f"walk{k:03d}.tsv")
        rows = []
        for label, kw in (("1 local worker", {"workers": 1}), ("2 local workers", {"workers": 2})):
            t = time.perf_counter()
            agg = run_score(arch, args.model, Path(td) / label.replace(" ", "_"), progress=False, **kw)
            rows.append((label, time.perf_counter() - t, agg["audio_h_processed"]))
        import distributed

        with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                      host="127.0.0.1", dashboard_address=None) as cluster:
            t = time.perf_counter()
            agg = run_score(arch, args.model, Path(td) / "cluster", progress=False,
                            cluster=cluster.scheduler_address)
            rows.append(("Dask LocalCluster, 2 workers", time.perf_counter() - t,
                         agg["audio_h_processed"]))
    print(f"scenemon score, {args.files} files of 230 s ({args.files * 230 / 3600:.2f} h), "
          f"{Path(args.model).name}; wall time includes worker start-up:")
    for label, wall, hours in rows:
        print(f"  {label:<30} {wall:6.1f} s   {hours / (wall / 60):6.2f} audio hours per minute")
    return 0


if __name__ == "__main__":
    sys.exit(main())
