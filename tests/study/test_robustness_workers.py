"""Workers never outlive the study (issue 13, item 7): SIGKILL, SIGTERM or Ctrl-C (SIGINT)
of the parent leaves no worker behind; a warning when --workers exceeds the CPUs."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest

from holonomic.cli import main
from holonomic.study.execution import usable_cpus
from tests.study.robust_helpers import SMALL_TOML, write_study

pytestmark = pytest.mark.skipif(not Path("/proc/self/stat").exists(),
                                reason="reads the process table from /proc")

SRC = str(Path(__file__).resolve().parents[2] / "src")
ROOT = str(Path(__file__).resolve().parents[2])


def _stat(pid: int) -> list[str] | None:
    """Fields of /proc/<pid>/stat after the command name (state first), or None."""
    try:
        text = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return None
    return text.rsplit(")", 1)[1].split()


def _children(pid: int) -> dict[int, str]:
    """Processes whose parent is ``pid``: their start times by pid (guards against reuse)."""
    found = {}
    for entry in os.listdir("/proc"):
        if entry.isdigit():
            fields = _stat(int(entry))
            if fields is not None and int(fields[1]) == pid:
                found[int(entry)] = fields[19]
    return found


def _alive(pid: int, started: str) -> bool:
    fields = _stat(pid)
    return fields is not None and fields[19] == started and fields[0] not in ("Z", "X")


def _wait_gone(processes: dict[int, str], seconds: float) -> dict[int, str]:
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        left = {pid: s for pid, s in processes.items() if _alive(pid, s)}
        if not left:
            return {}
        time.sleep(0.1)
    return {pid: s for pid, s in processes.items() if _alive(pid, s)}


def _env() -> dict[str, str]:
    path = os.pathsep.join(p for p in (SRC, ROOT, os.environ.get("PYTHONPATH")) if p)
    return {**os.environ, "PYTHONPATH": path, "PYTHONUNBUFFERED": "1"}


#: Runs the command line with a worker set-up that starts 1.5 s late, as on a loaded machine:
#: a signal then reaches workers that still carry the parent's handlers (unless held).
_SLOW_WORKER_START = textwrap.dedent("""
    import sys, time
    from holonomic.study import execution
    original = execution._worker_init
    def late(*args):
        time.sleep(1.5)
        original(*args)
    execution._worker_init = late
    from holonomic.cli import main
    sys.exit(main(sys.argv[1:]))
""")


def _start_study(tmp_path: Path, slow_workers: bool = False,
                 ) -> tuple[subprocess.Popen, dict[int, str]]:
    """A study with 2 workers and long runs, started as a command; waits for the workers."""
    study = write_study(tmp_path, SMALL_TOML.replace("epochs = 3", "epochs = 5000"))
    command = ["-c", _SLOW_WORKER_START] if slow_workers else ["-m", "holonomic"]
    proc = subprocess.Popen([sys.executable, *command, "study", str(study), "--out",
                             str(tmp_path / "out"), "--workers", "2", "--quiet", "--no-plots"],
                            env=_env(), stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True)
    deadline = time.monotonic() + 60
    workers: dict[int, str] = {}
    while time.monotonic() < deadline and proc.poll() is None:
        workers = _children(proc.pid)
        if len(workers) >= 2:
            break
        time.sleep(0.05)
    if len(workers) < 2:
        proc.kill()
        _, err = proc.communicate()
        pytest.fail(f"the study never started 2 workers: {err}")
    return proc, workers


@pytest.mark.slow
@pytest.mark.parametrize("slow_workers", [False, True], ids=["", "workers-starting"])
@pytest.mark.parametrize("how", ["SIGKILL", "SIGTERM", "SIGINT"])
def test_workers_end_with_the_parent(tmp_path, how, slow_workers):
    # workers-starting: the signal comes while the workers are still being set up (a
    # loaded machine); they must end quietly, without a traceback from the parent's handler
    proc, workers = _start_study(tmp_path, slow_workers)
    try:
        proc.send_signal(getattr(signal, how))
        proc.wait(timeout=30)
        left = _wait_gone(workers, 5.0)
        assert not left, f"workers still running after the parent got {how}: {left}"
        err = proc.stderr.read()  # the workers held the pipe too: read once they are gone
        if how == "SIGKILL":
            assert proc.returncode == -signal.SIGKILL
        else:  # the parent stops the pool and says so
            expected = {"SIGTERM": (143, "terminated by SIGTERM"), "SIGINT": (130, "interrupted")}
            assert proc.returncode == expected[how][0], err
            assert expected[how][1] in err and "rerun the same command" in err
            assert "Traceback" not in err
    finally:
        for pid, started in workers.items():  # only if the test failed
            if _alive(pid, started):
                os.kill(pid, signal.SIGKILL)
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        proc.stdout.close()
        proc.stderr.close()


@pytest.mark.slow
def test_parent_watch_without_the_kernel_signal(tmp_path):
    # the portable fallback alone: a thread that sees the parent's pid change
    script = textwrap.dedent("""
        import os, time
        from holonomic.study.execution import _exit_with_parent
        parent = os.getpid()
        child = os.fork()
        if child == 0:
            _exit_with_parent(parent, kernel_signal=False)
            time.sleep(60)
            os._exit(0)
        print(child, flush=True)
        time.sleep(0.2)
        os._exit(0)
    """)
    done = subprocess.run([sys.executable, "-c", script], env=_env(), capture_output=True,
                          text=True, timeout=60)
    child = int(done.stdout.split()[0])
    fields = _stat(child)
    if fields is None:
        return  # already gone
    assert not _wait_gone({child: fields[19]}, 5.0), "the child outlived its parent"


def test_more_workers_than_cpus_warns(capsys, tmp_path):
    cpus = usable_cpus()
    assert main(["study", str(tmp_path / "missing.toml"), "--out", str(tmp_path / "o"),
                 "--workers", str(cpus + 1)]) == 2
    lines = capsys.readouterr().err.splitlines()
    warnings = [line for line in lines if "warning" in line]
    assert len(warnings) == 1 and f"--workers {cpus + 1}" in warnings[0]
    assert f"{cpus} CPU" in warnings[0]
    assert main(["study", str(tmp_path / "missing.toml"), "--out", str(tmp_path / "o"),
                 "--workers", str(cpus)]) == 2
    assert "warning" not in capsys.readouterr().err
