"""Small builders for invented test cases (no file needed)."""

from __future__ import annotations

from allocator.model import AllocationSettings, Case, Contributor, CostCurve, Requirement


def reciprocal(a=0.0, b=0.01):
    return CostCurve(curve="reciprocal", a=a, b=b)


def contributor(name, nominal=10.0, tolerance=0.05, limits=(0.005, 0.2), **kw):
    kw.setdefault("cost", reciprocal())
    return Contributor(name=name, nominal=nominal, tolerance=tolerance, limits=limits, **kw)


def make_case(contributors, requirements, models=("worst-case", "rss"), **kw):
    return Case(
        title=kw.pop("title", "invented test case"),
        contributors=tuple(contributors),
        requirements=tuple(requirements),
        allocation=AllocationSettings(models=tuple(models)),
        **kw,
    )


def chain_requirement(name, chain, lower=None, upper=None, fallout_ppm=2700.0):
    return Requirement(name=name, chain=dict(chain), lower=lower, upper=upper, fallout_ppm=fallout_ppm)


# --------------------------------------------------------------------------- a user's terminal


def run_on_a_terminal(args, cwd):
    """Run the command line in a fresh process with stderr on a pseudo-terminal.

    Returns (exit code, stdout text, everything written to the terminal). The terminal
    is 100 columns wide, as a user's would be.
    """
    import fcntl
    import os
    import pty
    import site
    import struct
    import subprocess
    import sys
    import termios
    import threading
    from pathlib import Path

    root = Path(__file__).resolve().parents[1]
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(root), *site.getsitepackages()]))
    master, slave = pty.openpty()
    fcntl.ioctl(slave, termios.TIOCSWINSZ, struct.pack("HHHH", 30, 100, 0, 0))
    chunks = []

    def read():
        while True:
            try:
                data = os.read(master, 4096)
            except OSError:  # the other end closed
                return
            if not data:
                return
            chunks.append(data)

    reader = threading.Thread(target=read, daemon=True)
    reader.start()
    try:
        done = subprocess.run([sys.executable, "-m", "allocator", *map(str, args)], cwd=cwd, env=env,
                              stdin=subprocess.DEVNULL, stdout=subprocess.PIPE, stderr=slave,
                              timeout=300)
    finally:
        os.close(slave)
        reader.join(timeout=10)
        os.close(master)
    return done.returncode, done.stdout.decode(), b"".join(chunks).decode(errors="replace")
