"""Clear errors with exit status 2 instead of tracebacks (issue 13, item 13): unusable --out,
a full disk (a rerun after freeing space resumes), model factories that cannot be used, a
factory module beside the study file; documented exit statuses, interrupts."""

from __future__ import annotations

import errno
import os
import signal
import sys
from pathlib import Path

import pytest

from holonomic.cli import main
from holonomic.study import StudyOutputError, execution, storage
from tests.study.robust_helpers import N_SMALL_RUNS, SMALL_TOML, write_study


def _cli(study: Path, out: Path, *extra: str) -> int:
    return main(["study", str(study), "--out", str(out), "--quiet", "--no-plots", *extra])


def _no_traceback(err: str) -> str:
    assert "Traceback" not in err
    return err


# ---------------------------------------------------------------------------------------
# --out


def test_out_that_is_a_file_is_refused(tmp_path, capsys):
    study = write_study(tmp_path)
    afile = tmp_path / "afile"
    afile.write_text("keep me")
    assert _cli(study, afile) == 2
    assert "is a file, not a directory" in _no_traceback(capsys.readouterr().err)
    assert _cli(study, afile / "sub") == 2
    err = _no_traceback(capsys.readouterr().err)
    assert f"{str(afile)!r} is a file" in err and "cannot be created" in err
    assert _cli(study, afile, "--report-only") == 2
    assert afile.read_text() == "keep me"


def test_out_that_cannot_be_created_is_refused(tmp_path, capsys):
    # root ignores permission bits, so use a place no one can create folders in
    study = write_study(tmp_path)
    assert _cli(study, Path("/proc/holonomic-no-such/out")) == 2
    err = _no_traceback(capsys.readouterr().err)
    assert "/proc/holonomic-no-such/out" in err


@pytest.mark.skipif(os.name != "posix" or os.geteuid() == 0,
                    reason="needs a user whom permission bits bind (not root)")
def test_out_in_a_read_only_folder_is_refused(tmp_path, capsys):
    study = write_study(tmp_path)
    locked = tmp_path / "locked"
    locked.mkdir()
    locked.chmod(0o500)
    try:
        assert _cli(study, locked / "out") == 2
        assert "not writable" in _no_traceback(capsys.readouterr().err)
    finally:
        locked.chmod(0o700)


def test_check_output_dir_names_the_problem(tmp_path):
    (tmp_path / "f").write_text("")
    with pytest.raises(StudyOutputError, match="is a file, not a directory"):
        storage.check_output_dir(tmp_path / "f")
    storage.check_output_dir(tmp_path / "new" / "deeper")  # creatable: fine, nothing made
    assert not (tmp_path / "new").exists()


# ---------------------------------------------------------------------------------------
# A full disk


def _full_disk_after(monkeypatch, n_writes: int, only: str | None = None) -> list[Path]:
    """Make the n-th atomic write onward (of files whose path contains ``only``) fail as
    a full disk does, after a part of the file was written."""
    written: list[Path] = []
    real = storage._write_synced

    def writer(handle, text):
        name = Path(handle.name)
        if (only is None or only in str(name)) and len(written) >= n_writes:
            handle.write(text[: len(text) // 2])
            handle.close()
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        written.append(name)
        real(handle, text)

    monkeypatch.setattr(storage, "_write_synced", writer)
    return written


@pytest.mark.slow
def test_full_disk_is_a_clear_error_and_a_rerun_resumes(tmp_path, monkeypatch, capsys):
    study = write_study(tmp_path)
    out = tmp_path / "out"
    _full_disk_after(monkeypatch, 3)  # study.json and two runs fit
    assert _cli(study, out) == 2
    err = _no_traceback(capsys.readouterr().err)
    kept = sorted((out / "runs").glob("*.json"))
    assert len(kept) == 2
    assert "no space left while writing" in err and str(out / "runs") in err
    assert "Free disk space" in err and "rerun the same command" in err
    assert not list(out.rglob(".*.tmp*"))  # no half-written temporary is left
    stamps = {p.name: p.stat().st_mtime_ns for p in kept}

    monkeypatch.undo()  # space freed
    trained: list[str] = []
    real = execution.train_run
    monkeypatch.setattr(execution, "train_run",
                        lambda config, spec, **kw: trained.append(spec.key) or real(
                            config, spec, **kw))
    assert _cli(study, out) == 0
    assert len(trained) == N_SMALL_RUNS - 2 and not set(trained) & {p.stem for p in kept}
    assert {p.name: p.stat().st_mtime_ns for p in kept} == stamps
    assert (out / "results.csv").is_file()


@pytest.mark.slow
def test_full_disk_while_writing_the_report(tmp_path, monkeypatch, capsys):
    study = write_study(tmp_path)
    out = tmp_path / "out"
    _full_disk_after(monkeypatch, 0, only="results.csv")
    assert _cli(study, out) == 2
    err = _no_traceback(capsys.readouterr().err)
    assert f"no space left while writing {str(out / 'results.csv')!r}" in err
    assert len(list((out / "runs").glob("*.json"))) == N_SMALL_RUNS
    monkeypatch.undo()
    assert _cli(study, out, "--report-only") == 0


@pytest.mark.slow
def test_full_disk_in_a_worker_process(tmp_path, monkeypatch, capsys):
    if "fork" not in __import__("multiprocessing").get_all_start_methods():
        pytest.skip("the failing writer reaches the workers through fork")
    study = write_study(tmp_path)
    out = tmp_path / "out"
    _full_disk_after(monkeypatch, 0, only=f"{os.sep}runs{os.sep}")
    assert _cli(study, out, "--workers", "2") == 2
    err = _no_traceback(capsys.readouterr().err)
    assert "no space left while writing" in err and str(out / "runs") in err


def test_output_error_keeps_its_fields_across_processes():
    import pickle

    error = StudyOutputError("no space", "/x/y.json", errno.ENOSPC)
    copy = pickle.loads(pickle.dumps(error))
    assert (str(copy), copy.path, copy.errno) == ("no space", "/x/y.json", errno.ENOSPC)


def test_other_os_errors_pass_through():
    with pytest.raises(ConnectionResetError):
        with storage.output_errors("somewhere"):
            raise ConnectionResetError(errno.ECONNRESET, "reset")


# ---------------------------------------------------------------------------------------
# Model factories


_FACTORIES = {
    "wrong signature": ("def make(in_features):\n    return None\n",
                        ["cannot be called as factory(in_features, n_outputs)",
                         "def make_model(in_features: int, n_outputs: int) -> torch.nn.Module",
                         "number of classes, or 1 for regression"]),
    "keyword only": ("def make(*, in_features, n_outputs):\n    return None\n",
                     ["cannot be called as factory(in_features, n_outputs)"]),
    "not a module": ("def make(in_features, n_outputs):\n    return [in_features, n_outputs]\n",
                     ["returned list, not a torch nn.Module", "def make_model("]),
    "no such function": ("def other(in_features, n_outputs):\n    return None\n",
                         ["has no function 'make'", "def make_model("]),
    "missing import": ("import not_installed_pkg_qz\n", ["imports 'not_installed_pkg_qz'",
                                                         "not installed"]),
    "syntax error": ("def make(in_features, n_outputs)\n    return None\n",
                     ["syntax error", "line 1"]),
}


@pytest.mark.parametrize("case", list(_FACTORIES))
def test_unusable_factory_is_a_clear_error(tmp_path, capsys, case):
    source, expected = _FACTORIES[case]
    module = f"factory_{case.replace(' ', '_')}_{os.getpid()}"
    (tmp_path / f"{module}.py").write_text(source)
    study = write_study(tmp_path, SMALL_TOML.replace("widths = [8, 8]",
                                                     f'factory = "{module}:make"'))
    out = tmp_path / "out"
    assert _cli(study, out) == 2
    err = _no_traceback(capsys.readouterr().err)
    for text in expected:
        assert text in err, (text, err)
    assert not out.exists()
    assert str(tmp_path) not in sys.path  # the study folder was on the path only meanwhile


def test_missing_factory_module_says_where_it_looked(tmp_path, capsys):
    study = write_study(tmp_path, SMALL_TOML.replace("widths = [8, 8]",
                                                     'factory = "absent_model_zq:make"'))
    assert _cli(study, tmp_path / "out") == 2
    err = _no_traceback(capsys.readouterr().err)
    assert "cannot be imported" in err and "beside the study file" in err
    assert str(tmp_path.resolve()) in err


def test_factory_error_inside_the_users_code_is_not_hidden(tmp_path):
    module = f"factory_buggy_{os.getpid()}"
    (tmp_path / f"{module}.py").write_text(
        "def make(in_features, n_outputs):\n    return undefined_name\n")
    study = write_study(tmp_path, SMALL_TOML.replace("widths = [8, 8]",
                                                     f'factory = "{module}:make"'))
    with pytest.raises(NameError):  # a bug in the factory keeps its traceback
        _cli(study, tmp_path / "out")


@pytest.mark.slow
def test_factory_module_beside_the_study_file(tmp_path, capsys):
    module = f"beside_model_{os.getpid()}"
    (tmp_path / f"{module}.py").write_text(
        "from torch import nn\n\n"
        "def make(in_features, n_outputs):\n"
        "    return nn.Sequential(nn.Linear(in_features, 8), nn.ReLU(), nn.Linear(8, 8),\n"
        "                         nn.ReLU(), nn.Linear(8, n_outputs))\n")
    study = write_study(tmp_path, SMALL_TOML.replace("widths = [8, 8]",
                                                     f'factory = "{module}:make"'))
    out = tmp_path / "out"
    sys.modules.pop(module, None)
    assert _cli(study, out, "--workers", "2") == 0, capsys.readouterr().err
    assert len(list((out / "runs").glob("*.json"))) == N_SMALL_RUNS
    assert str(tmp_path) not in sys.path and str(tmp_path.resolve()) not in sys.path
    sys.modules.pop(module, None)


# ---------------------------------------------------------------------------------------
# Exit statuses and interrupts


def test_exit_statuses_are_documented(capsys):
    with pytest.raises(SystemExit) as caught:
        main(["study", "--help"])
    assert caught.value.code == 0
    text = capsys.readouterr().out
    assert "exit statuses:" in text
    for status in ("0 ", "1 ", "2 ", "130", "143"):
        assert f"\n  {status}" in text, status


@pytest.mark.slow
@pytest.mark.parametrize("how,status", [("interrupt", 130), ("sigterm", 143)])
def test_interrupt_and_sigterm_keep_finished_runs(tmp_path, monkeypatch, capsys, how, status):
    study = write_study(tmp_path)
    out = tmp_path / "out"
    real = execution.train_run
    calls: list[str] = []

    def train(config, spec, **kw):
        if len(calls) == 2:
            if how == "interrupt":
                raise KeyboardInterrupt
            os.kill(os.getpid(), signal.SIGTERM)  # handled: raises StudyTerminated here
        calls.append(spec.key)
        return real(config, spec, **kw)

    monkeypatch.setattr(execution, "train_run", train)
    previous = signal.getsignal(signal.SIGTERM)
    assert _cli(study, out) == status
    err = _no_traceback(capsys.readouterr().err)
    assert "rerun the same command to resume" in err
    assert sorted(p.stem for p in (out / "runs").glob("*.json")) == sorted(calls)
    assert signal.getsignal(signal.SIGTERM) is previous  # the handler is put back
