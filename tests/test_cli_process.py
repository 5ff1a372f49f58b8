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


@pytest.mark.parametrize("command", ["init", "analyze", "allocate", "frontier", "verify", "report"])
def test_every_command_has_help(tmp_path, command):
    done = run(command, "--help", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert "Usage:" in done.stdout


def test_bad_input_is_one_line_and_exit_2_in_a_fresh_process(tmp_path):
    done = run("analyze", tmp_path / "missing.toml", cwd=tmp_path)
    assert done.returncode == 2
    assert "Traceback" not in done.stderr
    assert len(done.stderr.strip().splitlines()) == 1
    assert "missing.toml" in done.stderr


def test_python_dash_m_allocator(tmp_path):
    done = subprocess.run([sys.executable, "-m", "allocator", "--version"], cwd=tmp_path, capture_output=True, text=True,
                          env=dict(os.environ, PYTHONPATH=str(ROOT)), timeout=60)
    assert done.returncode == 0 and "allocator" in done.stdout
