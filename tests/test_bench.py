"""`render bench`: one short run yields every figure, finite and of the right sign; no timing is asserted."""

import json
import math

import pytest

from render.bench import GOALS, format_bench, repeat_spread, run_bench
from render.errors import OutputError, ParameterError

#: Every figure the JSON must hold, by section.
FIGURES = {
    "limit": ("fft_s", "io_s", "total_s", "x_realtime"),
    "end_to_end": ("wall_s", "x_realtime", "render_s", "render_x_realtime", "plan_s", "startup_s", "warm_wall_s",
                   "warm_x_realtime", "warm_plan_s"),
    "script": ("wall_s", "x_realtime", "max_abs_diff", "max_diff_dbfs", "loudness_diff_lu"),
    "time_domain": ("excerpt_s", "excerpt_wall_s", "scaled_s", "x_realtime"),
    "memory": ("short_minutes", "long_minutes", "short_rss_mb", "long_rss_mb", "short_plan_rss_mb", "long_plan_rss_mb"),
    "scaling": ("files", "audio_s", "jobs", "jobs_1_s", "jobs_n_s", "jobs_1_x_realtime", "jobs_n_x_realtime"),
}
RATIOS = ("end_to_end_over_limit", "render_over_limit", "end_to_end_warm_over_limit", "script_over_ours",
          "script_over_ours_warm", "script_over_render", "max_diff_dbfs", "time_domain_over_ours",
          "time_domain_over_ours_warm", "time_domain_over_render", "rss_long_over_short", "long_rss_mb",
          "jobs_n_over_jobs_1")
#: Figures that are levels in dB or LU and may be negative or zero (every other figure is a positive quantity).
LEVELS = ("_db", "_dbfs", "_dbtp", "_lufs", "_lu")


@pytest.fixture(scope="module")
def bench(tmp_path_factory):
    path = tmp_path_factory.mktemp("bench") / "bench.json"
    results = run_bench(minutes=0.1, json_path=path, quiet=True, repeats=1)
    return results, json.loads(path.read_text(encoding="utf-8"))


@pytest.mark.parametrize("section, name", [(s, n) for s, names in FIGURES.items() for n in names])
def test_every_figure_is_in_the_json_finite_and_positive_unless_a_level(bench, section, name):
    _, data = bench
    value = data["figures"][section][name]
    assert isinstance(value, (int, float)) and math.isfinite(value)
    if not name.endswith(LEVELS):
        assert value > 0


@pytest.mark.parametrize("name", RATIOS)
def test_every_ratio_has_a_finite_value_and_its_goal(bench, name):
    _, data = bench
    ratio = data["ratios"][name]
    assert math.isfinite(ratio["value"])
    if name in GOALS:
        op, threshold, _ = GOALS[name]
        assert ratio["goal"] == f"{op} {threshold:g}" and ratio["met"] in (True, False, None)
    if name != "max_diff_dbfs":
        assert ratio["value"] > 0


def test_the_json_holds_what_run_bench_returns(bench):
    results, data = bench
    assert data == json.loads(json.dumps(results))


@pytest.mark.parametrize("key", ["platform", "cpu_model", "cores", "python", "numpy", "scipy"])
def test_the_machine_is_described(bench, key):
    _, data = bench
    assert data["machine"][key]


def test_the_memory_runs_at_a_small_size_are_minutes_and_six_times_minutes(bench):
    _, data = bench
    memory = data["figures"]["memory"]
    assert (memory["short_minutes"], memory["long_minutes"]) == (0.1, pytest.approx(0.6))


def test_our_mix_equals_the_script_baselines_within_minus_100_dbfs(bench):
    # scipy.signal.fftconvolve as the reference convolution, at the same gain, before dither.
    _, data = bench
    assert data["figures"]["script"]["max_diff_dbfs"] <= -100.0


@pytest.mark.parametrize("label", ["1. limit", "2. end to end", "3. script baseline", "4. time-domain baseline",
                                   "5. peak RSS", "6. --jobs 1", "end to end / limit", "script / ours",
                                   "time-domain / ours", "RSS 0.6 min / 0.1 min", "--jobs"])
def test_the_table_shows_every_figure_and_ratio(bench, label):
    results, _ = bench
    assert label in format_bench(results)


@pytest.mark.parametrize(
    "kwargs, match",
    [
        ({"minutes": 0}, r"minutes = 0: must be a number > 0"),
        ({"minutes": -1.0}, r"minutes = -1.0: must be a number > 0"),
        ({"minutes": float("nan")}, r"minutes = nan: must be a number > 0"),
        ({"minutes": True}, r"minutes = True: must be a number > 0"),
        ({"minutes": 1.0, "jobs": 0}, r"jobs = 0: must be an integer >= 1"),
        ({"minutes": 1.0, "repeats": 0}, r"repeats = 0: must be an integer >= 1"),
    ],
)
def test_bad_arguments_are_refused_before_any_work(kwargs, match):
    with pytest.raises(ParameterError, match=match):
        run_bench(quiet=True, **kwargs)


def test_a_json_path_in_a_missing_folder_is_refused_before_any_work(tmp_path):
    with pytest.raises(OutputError, match=r"json_path = .*: its folder does not exist"):
        run_bench(minutes=1.0, json_path=tmp_path / "missing" / "bench.json", quiet=True)


@pytest.mark.parametrize(
    "values, expected",
    [
        ([2.0], 0.0),  # one repeat: no spread
        ([1.0, 1.0, 1.0], 0.0),
        ([1.0, 2.0, 3.0], 1.0),  # (3 - 1) / 2
        ([4.0, 5.0], 0.2222222222222222),  # (5 - 4) / 4.5
    ],
)
def test_repeat_spread_is_range_over_median(values, expected):
    assert repeat_spread(values) == pytest.approx(expected, rel=1e-12)


def test_repeat_spread_needs_a_value():
    with pytest.raises(ParameterError, match=r"values is empty: expected at least one timing"):
        repeat_spread([])
