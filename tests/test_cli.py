"""The pnpguard command line, run as a subprocess like a user would."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import skimage.io

from pnpguard import phantoms
from pnpguard.cli import main

VERBS = ("benchmark", "check", "compare", "demo", "list", "recover", "report", "sweep")


def run(*args: str, cwd: Path | None = None) -> subprocess.CompletedProcess:
    """``python -m pnpguard.cli ARGS`` with one BLAS and one torch thread."""
    env = {**os.environ, "OPENBLAS_NUM_THREADS": "1", "OMP_NUM_THREADS": "1"}
    return subprocess.run(
        [sys.executable, "-m", "pnpguard.cli", *args],
        capture_output=True,
        check=False,
        text=True,
        cwd=cwd,
        env=env,
        timeout=300,
    )


def assert_usage_error(done: subprocess.CompletedProcess, *words: str) -> None:
    """Exit status 2, one line on stderr starting with 'pnpguard: error:', no traceback."""
    assert done.returncode == 2, done.stderr
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1, done.stderr
    assert lines[0].startswith("pnpguard: error:")
    assert "Traceback" not in done.stderr
    for word in words:
        assert word in lines[0], lines[0]


@pytest.fixture(scope="module")
def frame(tmp_path_factory) -> Path:
    """A 32 x 32 cells frame saved as an 8-bit PNG."""
    path = tmp_path_factory.mktemp("images") / "frame.png"
    image = phantoms.make_phantom("cells", (32, 32), seed=3)
    skimage.io.imsave(path, (255 * image).round().astype(np.uint8), check_contrast=False)
    return path


@pytest.fixture(scope="module")
def results(tmp_path_factory) -> Path:
    """A tiny benchmark result file written by the CLI."""
    path = tmp_path_factory.mktemp("bench") / "tiny.json"
    done = run(
        "benchmark", "quick", "--tasks", "superres-x2", "--methods", "bicubic", "tikhonov",
        "fb/gaussian", "--size", "32", "--max-iter", "10", "--output", str(path), "--no-progress",
    )
    assert done.returncode == 0, done.stderr
    assert "superres-x2" in done.stdout and str(path) in done.stdout
    return path


def test_help_lists_every_verb_and_each_verb_has_help(capsys):
    # The installed script and python -m pnpguard.cli share main().
    done = run("--help")
    assert done.returncode == 0
    for verb in VERBS:
        assert verb in done.stdout
    for verb in VERBS:
        with pytest.raises(SystemExit) as exit_info:
            main([verb, "--help"])
        assert exit_info.value.code == 0
        assert "usage: pnpguard " + verb in capsys.readouterr().out


def test_usage_error_in_a_subprocess_is_one_line_without_traceback():
    assert_usage_error(run("benchmark", "fastest"), "unknown suite", "quick")


def _usage_error(capsys, argv, *words):
    assert main(argv) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("pnpguard: error:"), err
    for word in words:
        assert word in err[0], err[0]


@pytest.mark.parametrize(
    "argv, words",
    [
        ([], ["VERB"]),
        (["frobnicate"], ["invalid choice"]),
        (["benchmark", "--tasks", "superres-x3"], ["unknown task", "superres-x2"]),
        (["benchmark", "--threads", "0"], ["--threads", "from 1 to"]),
        (["demo", "--threads", "0"], ["--threads", "from 1 to"]),
        (["check", "wavelet", "x.png", "--threads", "-1"], ["--threads", "from 1 to"]),
        (["compare", "a.json"], ["required"]),
        (["compare", "a.json", "b.json"], ["does not exist"]),
        (["compare", "a.json", "b.json", "--aspects", "speed"], ["quality"]),
        (["report", "missing.json"], ["does not exist"]),
        (["list", "colours"], ["invalid choice"]),
        (["check", "wavelet", "missing.png"], ["does not exist"]),
    ],
)
def test_argument_mistakes(argv, words, capsys):
    _usage_error(capsys, argv, *words)


def test_check_names_and_images_mistakes(tmp_path, frame, capsys):
    _usage_error(capsys, ["check", "wavelets", str(frame)], "unknown shipped denoiser", "wavelet")
    _usage_error(capsys, ["check", "no_such_module:f", str(frame)], "cannot import module")
    _usage_error(capsys, ["check", "wavelet", str(frame), "--task", "ct-31-views"], "unknown task")
    odd = tmp_path / "odd.npy"
    np.save(odd, np.random.default_rng(0).random((33, 33)))
    _usage_error(capsys, ["check", "gaussian", str(odd), "--task", "superres-x2"], "divisible")
    text = tmp_path / "notes.txt"
    text.write_text("not an image")
    _usage_error(capsys, ["check", "gaussian", str(text)], "cannot read image")


def test_check_shipped_denoiser_prints_report_and_guarantees(frame):
    done = run("check", "wavelet", str(frame), "--task", "superres-x2")
    assert done.returncode == 0, done.stderr
    assert "verdict            PROVED" in done.stdout
    for algorithm in ("admm", "douglas_rachford", "forward_backward"):
        assert f"guarantee for {algorithm}" in done.stdout
    assert "Caution" not in done.stdout


def test_check_user_callable_from_the_current_directory(tmp_path, frame, capsys, monkeypatch):
    (tmp_path / "lab_filters.py").write_text("def halve(x):\n    return 0.5 * x\n\nnot_callable = 3\n")
    monkeypatch.chdir(tmp_path)
    assert main(["check", "lab_filters:halve", str(frame), "--budget", "20", "--task", "ct-30-views"]) == 0
    out = capsys.readouterr().out
    assert "ESTIMATED" in out
    assert "Caution: a convergence guarantee is not a correctness guarantee" in out
    _usage_error(capsys, ["check", "lab_filters:missing", str(frame)], "no attribute")
    _usage_error(capsys, ["check", "lab_filters:not_callable", str(frame)],
                 "'lab_filters:not_callable' is an object of type int; expected a Denoiser")
    _usage_error(capsys, ["check", "os:path", str(frame)], "is an object of type module; expected")


def test_benchmark_compare_and_report(results, tmp_path):
    document = json.loads(results.read_text())
    assert {r["method"] for r in document["results"]} == {"bicubic", "tikhonov", "fb/gaussian"}
    assert results.with_suffix(".npz").is_file()
    assert main(["compare", str(results), str(results)]) == 0
    worse = tmp_path / "worse.json"
    target = next(r for r in document["results"] if r["method"] == "tikhonov")
    target["psnr"] -= 1.0
    worse.write_text(json.dumps(document))
    dropped = run("compare", str(results), str(worse))
    assert dropped.returncode == 1
    assert "REGRESSION" in dropped.stdout and "tikhonov" in dropped.stdout
    assert main(["report", str(results), "--output", str(tmp_path / "report")]) == 0
    text = (tmp_path / "report" / "report.md").read_text()
    assert "| tikhonov | baseline |" in text
    assert (tmp_path / "report" / "superres-x2-images.png").is_file()


def test_list_names(capsys):
    assert main(["list", "denoisers"]) == 0
    out = capsys.readouterr().out
    assert "wavelet" in out and "nlm" in out
    assert main(["list", "tasks"]) == 0
    assert "ct-limited-120deg" in capsys.readouterr().out
    assert main(["list", "algorithms"]) == 0  # read from the algorithm and route tables
    out = capsys.readouterr().out
    assert "douglas_rachford" in out and "firmly nonexpansive" in out and "proximal_gradient  pgd" in out


def test_check_gives_guarantees_for_the_chosen_algorithms_only(frame, capsys):
    assert main(["check", "wavelet", str(frame), "--task", "superres-x2", "--algorithms", "fb", "admm"]) == 0
    out = capsys.readouterr().out
    assert "guarantee for forward_backward" in out and "guarantee for admm" in out
    assert "douglas_rachford" not in out
    _usage_error(capsys, ["check", "wavelet", str(frame), "--algorithms", "gd"], "unknown `algorithm`")


def test_demo_verb_runs_the_demo_at_the_requested_size_and_seed(capsys):
    # The real demo, not a stand-in: the frame it prints is the one it built.
    assert main(["demo", "--size", "32", "--seed", "5"]) == 0
    out = capsys.readouterr().out
    assert "synthetic 32x32 frame of fluorescent cells (seed 5)" in out
    assert "128x128" not in out
    assert "non-local means" in out and "refused:" in out


def test_unknown_arguments_are_refused_with_what_the_verb_accepts(capsys):
    _usage_error(capsys, ["demo", "--bogus"], "unrecognized arguments: --bogus", "--size", "--seed")
    _usage_error(capsys, ["list", "tasks", "extra"], "unrecognized arguments: extra",
                 "usage: pnpguard list", "tasks")


def test_values_out_of_range_are_usage_errors(frame, tmp_path, capsys):
    _usage_error(capsys, ["check", "wavelet", str(frame), "--budget", "5"], "--budget", ">= 20", "'5'")
    _usage_error(capsys, ["check", "wavelet", str(frame), "--margin", "1"], "--margin", "[0, 1)")
    _usage_error(capsys, ["check", "nlm", str(frame), "--seed", str(2**64)], "--seed", "2**63")
    _usage_error(capsys, ["check", "nlm", str(frame), "--seed", "-1"], "--seed", "'-1'")
    _usage_error(capsys, ["check", "wavelet", str(tmp_path)], "is a directory")
    _usage_error(capsys, ["demo", "--size", "8"], "--size", ">= 16")
    _usage_error(capsys, ["benchmark", "--size", "8"], "--size", ">= 16")
    tiny = ["benchmark", "--tasks", "superres-x2", "--size", "32", "--max-iter", "3", "--no-images"]
    _usage_error(capsys, [*tiny, "--methods", "fb/nlm", "--check-budget", "5"], "--check-budget", ">= 20")
    _usage_error(capsys, [*tiny, "--methods", "bicubic", "--output", str(tmp_path)], "--output",
                 "is a directory")


def test_report_mistakes_with_files_are_usage_errors(results, tmp_path, capsys):
    taken = tmp_path / "taken"
    taken.write_text("")
    _usage_error(capsys, ["report", str(results), "--output", str(taken)], "cannot write", str(taken))
    # A result file whose saved images are damaged.
    copy = tmp_path / "copy.json"
    copy.write_text(results.read_text())
    (tmp_path / json.loads(results.read_text())["images"]).write_bytes(b"PK\x03\x04 truncated")
    _usage_error(capsys, ["report", str(copy), "--output", str(tmp_path / "out")],
                 "cannot read the images saved with", str(copy))


def test_thread_count_beyond_the_machine_is_refused_before_any_run(tmp_path):
    # A huge torch thread count crashes the interpreter (segmentation fault), hence a
    # subprocess: the command line must refuse it while parsing.
    done = run("benchmark", "--threads", "100000", "--tasks", "superres-x2", "--methods", "bicubic",
               "--size", "32", "--no-images", "--output", str(tmp_path / "out.json"))
    assert_usage_error(done, "--threads", f"1 to {os.cpu_count()}")


def test_list_tasks_is_a_table(capsys):
    from pnpguard.bench import get_task, task_names

    assert main(["list", "tasks"]) == 0
    lines = capsys.readouterr().out.rstrip("\n").splitlines()
    columns = ["task", "family", "forward model", "noise", "phantom"]
    starts = [lines[0].index(column) for column in columns]
    assert starts == sorted(starts)
    assert set(lines[1]) <= {"-", " "}
    rows = lines[2:]
    assert len(rows) == len(task_names())
    models = {}
    for row, name in zip(rows, task_names()):
        assert "{" not in row and "'" not in row
        cells = [row[a:b].strip() for a, b in zip(starts, [*starts[1:], None])]
        task = get_task(name)
        assert cells[0] == name and cells[1] == task.family and cells[4] == task.phantom
        assert cells[3] == f"{100 * task.noise:g} %"
        models[name] = cells[2]
    # The settings of one task per family, written out (bench/_tasks.py, TASKS).
    assert models["deblur-motion-1pct"] == "motion blur, length 7 px at 30 deg (9x9 kernel), periodic"
    assert models["deblur-gaussian-5pct"] == "Gaussian blur, sigma 1.6 px (9x9 kernel), periodic"
    assert models["inpaint-random80"] == "80 % of pixels missing at random"
    assert models["inpaint-rows-scratches"] == "10 % of rows missing, 4 scratches"
    assert models["superres-x4"] == "4x4 box average, subsampled by 4, periodic"
    assert models["ct-limited-120deg"] == "parallel beam, 60 views over 120 deg"


def test_help_version_and_list_usage_import_no_heavy_module():
    # The command line starts fast when the verbs that need torch, scikit-image,
    # matplotlib or dask are not run (the start time itself is measured by
    # benchmarks/bench_cli.py, never asserted).
    heavy = ("torch", "skimage", "matplotlib", "dask")
    probe = (
        "import sys; from pnpguard.cli import main\n"
        "for argv in (['--help'], ['--version'], ['list', '--help'], ['list']):\n"
        "    try:\n"
        "        main(argv)\n"
        "    except SystemExit:\n"
        "        pass\n"
        f"print(sorted(name for name in {heavy!r} if name in sys.modules))\n"
    )
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, timeout=300, check=False)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip().splitlines()[-1] == "[]"


def test_the_overview_lists_the_same_verbs_as_the_full_parser():
    from pnpguard.cli import build_parser, overview_parser

    def verbs(parser):
        (group,) = [action for action in parser._actions if action.dest == "verb"]
        return list(group.choices)

    assert verbs(overview_parser()) == verbs(build_parser()) and sorted(verbs(build_parser())) == sorted(VERBS)


def test_import_pnpguard_loads_the_api_on_first_use():
    probe = (
        "import sys, pnpguard\n"
        "print('torch' in sys.modules)\n"
        "print(callable(pnpguard.forward_backward), 'torch' in sys.modules, len(pnpguard.__all__) > 50)\n"
    )
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, timeout=300, check=False)
    assert done.returncode == 0, done.stderr
    assert done.stdout.split() == ["False", "True", "True", "True"]


def test_the_stored_list_tables_match_the_definitions():
    # `pnpguard list` prints tables stored in catalogue.json (no torch import); they must be
    # what the task, algorithm, route and denoiser definitions produce now.
    from pnpguard._catalogue import live_catalogue, read_catalogue

    assert read_catalogue() == live_catalogue(), "run `python -m pnpguard._catalogue` to rewrite catalogue.json"


def test_benchmark_adds_the_strength_rule_column(tmp_path, capsys):
    out = tmp_path / "rule.json"
    assert main(["benchmark", "quick", "--tasks", "deblur-gaussian-1pct", "--size", "32", "--max-iter", "10",
                 "--methods", "fb/tv", "--strength-rule", "discrepancy", "--no-images", "--no-progress",
                 "-o", str(out)]) == 0
    printed = capsys.readouterr().out
    assert "fb/tv@discrepancy picks" in printed and "from the best strength it tried" in printed
    assert "nan" not in printed and "no gap (some task lacks a successful PnP or baseline run)" in printed
    methods = {r["method"] for r in json.loads(out.read_text())["results"]}
    assert methods == {"fb/tv", "fb/tv@discrepancy"}
