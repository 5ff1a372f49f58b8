"""The command line as a user runs it: a fresh Python process, not click's CliRunner.

CliRunner shares the test process, where pytest has already imported much of the standard
library; a fresh interpreter catches an import the command line forgot to make.
"""

import json
import os
import subprocess
import sys
from pathlib import Path

import site

import pytest

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "cases" / "gearbox_end_play.toml"


def run(*args, cwd):
    # -S: no site module, so no .pth hooks (an editable install's finder imports parts of
    # importlib that a plain install would not); the source tree and site-packages are
    # put on the path directly
    path = os.pathsep.join([str(ROOT), *site.getsitepackages()])
    env = dict(os.environ, PYTHONPATH=path)
    return subprocess.run(
        # what the console script does (``-m`` would import runpy, and with it importlib.util)
        [sys.executable, "-S", "-c", "import sys; from allocator.cli.main import main; main(sys.argv[1:])",
         *map(str, args)],
        cwd=cwd, env=env, capture_output=True, text=True, timeout=120,
    )


def test_readme_demo_runs_in_a_fresh_process(tmp_path):
    done = run("allocate", DEMO, "--json", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    results = json.loads(done.stdout)["results"]
    assert {r["model"] for r in results} == {"worst-case", "rss", "mean-shift"}
    assert all(r["status"] == "optimal" for r in results)


@pytest.mark.parametrize("command", ["init", "analyze", "allocate", "frontier", "verify", "report", "offer", "study", "convert", "fit-costs", "capability"])
def test_every_command_has_help(tmp_path, command):
    done = run(command, "--help", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert "Usage:" in done.stdout


def test_a_study_in_worker_processes_from_a_fresh_process(tmp_path):
    done = run("study", DEMO, "--model", "rss", "--workers", "2", "--json", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    rows = json.loads(done.stdout)["cases"]
    assert [(r["model"], r["status"]) for r in rows] == [("rss", "optimal")]


def test_fit_costs_and_capability_write_cases_in_a_fresh_process(tmp_path):
    fitted, measured = tmp_path / "fitted.toml", tmp_path / "measured.toml"
    done = run("fit-costs", ROOT / "cases" / "gearbox_quotes.csv", "--json", "--write", DEMO, fitted, cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert json.loads(done.stdout)["written"] == str(fitted)
    done = run("capability", fitted, ROOT / "cases" / "gearbox_measurements.csv", "--json", "--write", measured,
               cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    done = run("allocate", measured, "--json", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert all(r["status"] == "optimal" for r in json.loads(done.stdout)["results"])


def test_bad_input_is_one_line_and_exit_2_in_a_fresh_process(tmp_path):
    done = run("analyze", tmp_path / "missing.toml", cwd=tmp_path)
    assert done.returncode == 2
    assert "Traceback" not in done.stderr
    assert len(done.stderr.strip().splitlines()) == 1
    assert "missing.toml" in done.stderr


def test_convert_both_ways_in_a_fresh_process(tmp_path):
    pytest.importorskip("openpyxl", reason='workbooks need the extra: pip install "allocator[sheets]"')
    there = run("convert", DEMO, "gearbox.xlsx", cwd=tmp_path)
    assert there.returncode == 0, there.stderr
    back = run("convert", "gearbox.xlsx", "gearbox.toml", cwd=tmp_path)
    assert back.returncode == 0, back.stderr
    assert back.stdout == "wrote gearbox.toml: 6 contributors, 1 requirement\n"
    again = run("allocate", "gearbox.toml", "--model", "rss", "--json", "--xlsx", "rss.xlsx", cwd=tmp_path)
    assert again.returncode == 0, again.stderr
    assert (tmp_path / "rss.xlsx").is_file() and again.stderr == "wrote rss.xlsx\n"


def test_python_dash_m_allocator(tmp_path):
    done = subprocess.run([sys.executable, "-m", "allocator", "--version"], cwd=tmp_path, capture_output=True, text=True,
                          env=dict(os.environ, PYTHONPATH=str(ROOT)), timeout=60)
    assert done.returncode == 0 and "allocator" in done.stdout


def test_a_reader_that_goes_away_ends_the_command_quietly(tmp_path):
    # `allocator allocate CASE | head -1` where head has already gone: the pipe's read end
    # is closed before the command writes, so its first write fails (deterministically)
    path = os.pathsep.join([str(ROOT), *site.getsitepackages()])
    read_end, write_end = os.pipe()
    os.close(read_end)
    try:
        done = subprocess.run(
            [sys.executable, "-S", "-c", "import sys; from allocator.cli.main import main; main(sys.argv[1:])",
             "allocate", str(DEMO), "--model", "rss"],
            cwd=tmp_path, env=dict(os.environ, PYTHONPATH=path), stdout=write_end, stderr=subprocess.PIPE,
            text=True, timeout=120,
        )
    finally:
        os.close(write_end)
    assert done.stderr == ""  # no "error: broken pipe", no "Exception ignored ..."
    assert done.returncode == 141  # 128 + SIGPIPE, as a shell reports a command stopped by it


def test_head_of_a_pipe_in_a_shell(tmp_path):
    command = (f"{sys.executable} -S -c 'import sys; from allocator.cli.main import main; main(sys.argv[1:])' "
               f"allocate {DEMO} --model rss | head -1")
    path = os.pathsep.join([str(ROOT), *site.getsitepackages()])
    done = subprocess.run(["sh", "-c", command], cwd=tmp_path, env=dict(os.environ, PYTHONPATH=path),
                          capture_output=True, text=True, timeout=120)
    assert done.returncode == 0
    assert done.stdout.startswith("Gearbox") and done.stdout.count("\n") == 1
    assert done.stderr == ""


@pytest.mark.parametrize(
    "args",
    [
        ["analyze", "missing.toml"],
        ["analyze", "."],
        ["allocate", str(DEMO), "--fix", "x"],
        ["verify", str(DEMO), "--samples", "2.5"],
        ["report", str(DEMO), "-o", "."],
    ],
    ids=["missing", "folder", "bad-fix", "bad-samples", "output-folder"],
)
def test_one_line_errors_end_with_a_newline(tmp_path, args):
    done = run(*args, cwd=tmp_path)
    assert done.returncode == 2
    assert done.stderr.startswith("error: ") and done.stderr.endswith("\n")
    assert done.stderr.count("\n") == 1, done.stderr
    assert done.stdout == ""


def test_help_lists_every_command_with_a_whole_summary(tmp_path):
    done = run("--help", cwd=tmp_path)
    assert done.returncode == 0
    listing = done.stdout.split("Commands:", 1)[1].splitlines()
    names = [line.split()[0] for line in listing if line.startswith("  ") and not line.startswith("   ")]
    assert names == ["init", "analyze", "allocate", "frontier", "verify", "report", "offer", "study", "convert", "fit-costs", "capability"]
    for line in listing:  # no summary cut off
        assert not line.rstrip().endswith("..."), line
    # and the same with a narrow terminal: a long summary wraps, it is never cut
    narrow = subprocess.run(
        [sys.executable, "-c", "from allocator.cli.main import main; main(['--help'])"],
        cwd=tmp_path, env=dict(os.environ, PYTHONPATH=str(ROOT), COLUMNS="52"),
        capture_output=True, text=True, timeout=60,
    )
    for line in narrow.stdout.split("Commands:", 1)[1].splitlines():
        assert not line.rstrip().endswith("..."), line
