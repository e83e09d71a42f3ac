"""The benchmark harness runs and names its sizes (nothing is timed here)."""

from .conftest import ROOT


def test_benchmark_harness_runs_smallest_size(tmp_path):
    import importlib.util

    spec = importlib.util.spec_from_file_location("bench", ROOT / "benchmarks" / "run.py")
    bench = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(bench)
    rows = bench.run_suite(["tiny"], tmp_path, repeats=1)
    assert rows and rows[0]["stations"] > 0 and rows[0]["core_member_values_per_s"] > 0
    assert rows[0]["run_s"] > 0 and rows[0]["floor_s"] > 0


def test_benchmark_harness_names_an_unknown_size(capsys):
    import importlib.util

    spec = importlib.util.spec_from_file_location("bench", ROOT / "benchmarks" / "run.py")
    bench = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(bench)
    assert bench.main(["3000"]) == 2
    assert "unknown benchmark size '3000'" in capsys.readouterr().err
    assert bench.main(["--help"]) == 0
    assert "300x30d" in capsys.readouterr().out


def test_follow_benchmark_harness_runs_a_tiny_night(tmp_path):
    import importlib.util

    spec = importlib.util.spec_from_file_location("bench_follow", ROOT / "benchmarks" / "follow.py")
    bench = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(bench)
    r = bench.run(12, 2.0, tmp_path, once=False)
    assert r["steps"] == 25 and r["calls_timed"] > 0 and r["cpu_median_s"] > 0 and r["budget_rows"] > 0
