"""bench/run --quick end to end (so the benchmark suite cannot rot), and its RESULTS.md rewriting."""
import importlib.machinery
import importlib.util
import os
import re
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
RUN = ROOT / "bench" / "run"


def _run_module():
    loader = importlib.machinery.SourceFileLoader("bench_run", str(RUN))
    spec = importlib.util.spec_from_loader("bench_run", loader)
    mod = importlib.util.module_from_spec(spec)
    loader.exec_module(mod)
    return mod


def test_write_results_replaces_only_the_generated_part(tmp_path):
    run = _run_module()
    path = tmp_path / "RESULTS.md"
    path.write_text("# Benchmark results\n\nHand-written notes stay.\n")
    run.write_results(path, f"{run.BEGIN}\nfirst\n{run.END}\n")
    run.write_results(path, f"{run.BEGIN}\nsecond\n{run.END}\n")
    text = path.read_text()
    assert text.startswith("# Benchmark results\n") and "Hand-written notes stay." in text
    assert "second" in text and "first" not in text and text.count(run.BEGIN) == 1


def test_quick_run_measures_every_stage(tmp_path):
    out = tmp_path / "RESULTS.md"
    out.write_text("# Benchmark results\n\nNotes.\n")
    env = {**os.environ, "GEOTWEEN_BENCH_CACHE": str(tmp_path / "cache"), "GEOTWEEN_BENCH_THREADS": "1"}
    proc = subprocess.run([sys.executable, str(RUN), "--quick", "--out", str(out), "--work", str(tmp_path / "w"),
                           "--port", "8791"], env=env, cwd=ROOT, capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr[-3000:]
    text = out.read_text()
    assert "Notes." in text and "--quick" in text
    for heading in ("Quality at 16 px", "Quality at 32 px", "Colour relief tile at 16 px", "Photo window at 16 px",
                    "Turntable at 16 px", "Camera move at 16 px", "Turntable from scattered settings at 16 px",
                    "Camera move from scattered settings at 16 px",
                    "Latency and throughput", "Route search", "Service memory", "Fill throughput as jobs",
                    "Frames at full size", "Full-size throughput", "with the full-size captures"):
        assert heading in text, heading
    # demo at two sizes, colour tile, photo window, turntable, camera move, scattered turntable and camera
    # move, and the two scattered scenes again with routes between the truth pairs' true settings
    tables = 8 + 2
    assert text.count("routes asked between their true settings") == 2
    # every method row of the quality tables carries numbers
    for method in ("dissolve", "flow", "nearest", "straight", "geodesic", "ceiling"):
        # (mean SSIM may be below 0 for a 20-step model's frames: SSIM lies in [-1, 1])
        rows = re.findall(rf"^\| {method} \| ([0-9.]+) \| (-?[0-9.]+) \|", text, flags=re.M)
        assert len(rows) == tables and all(float(p) > 0 for p, _ in rows), method
    # each quality table is followed by its span table; the truth sets' long pairs fill the long bucket
    assert text.count("By span (reach of each pair's ends") == tables
    for method in ("dissolve", "nearest", "geodesic", "ceiling"):
        rows = re.findall(rf"^\| long \| {method} \| ([0-9.]+) \| (-?[0-9.]+) \|", text, flags=re.M)
        assert len(rows) == tables and all(float(p) > 0 for p, _ in rows), method
    # routes agree with scipy's Dijkstra to rounding
    diffs = [float(x) for x in re.findall(r"\| ([0-9.]+e[+-][0-9]+) \(\d+ pairs\) \|", text)]
    assert len(diffs) == 3 and max(diffs) < 1e-9
    assert re.search(r"\| 16 \| [0-9.]+ \| [0-9.]+ \|", text)  # 16-frame latency row
    assert re.search(r"HTTP overhead, 16-frame answer: [0-9.]+ ms through HTTP .* [0-9.]+ ms for the same answer "
                     r"bytes in process, ratio [0-9.]+ \(median of [0-9]+ pairs", text)
