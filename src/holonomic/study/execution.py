"""Running a study's runs: resumable, in parallel, and safe to refuse, interrupt or kill.

:func:`run_all` trains every run of a study that is not stored yet. Before it creates or
writes anything it loads the data, reads and validates the stored runs
(:func:`holonomic.study.storage.read_records`), checks that they belong to this study
(:func:`check_compatible`: same data, model, budget and ensemble settings, and the same data
*contents*, by fingerprint) and that a model factory can be built (:func:`check_model`), so
a refused command leaves the output directory as it was.

With ``workers > 1`` the runs go to a pool of processes (``fork`` where available). Workers
never outlive the study: each asks the kernel to send it SIGTERM when its parent dies
(Linux ``prctl(PR_SET_PDEATHSIG)``) and also watches its parent's pid from a thread (every
:data:`PARENT_POLL_S` seconds, on every platform); the parent stops the pool (cancels the
queue, terminates the workers) on any exception, Ctrl-C or :class:`StudyTerminated`
(:func:`terminate_on_signals` turns SIGTERM / SIGHUP into it). Finished runs are always
kept: rerunning the same command resumes.
"""

from __future__ import annotations

import contextlib
import ctypes
import math
import os
import signal
import sys
import threading
import time
import warnings
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
from multiprocessing import get_all_start_methods, get_context
from pathlib import Path
from typing import Callable, Iterator, Sequence

import torch

from holonomic.study import storage
from holonomic.study.config import StudyConfig, StudyConfigError
from holonomic.study.arms import check_layer_selections
from holonomic.study.data import load_dataset
from holonomic.study.models import build_model, import_path
from holonomic.study.runner import RunSpec, plan_runs, train_run

__all__ = [
    "PARENT_POLL_S",
    "StudyTerminated",
    "check_compatible",
    "check_forward",
    "check_model",
    "data_fingerprint",
    "prepare_runs",
    "halving_full_runs",
    "halving_rung",
    "halving_survivors",
    "run_all",
    "run_halving",
    "terminate_on_signals",
    "usable_cpus",
]

#: Seconds between a worker's checks that its parent still runs (the portable fallback).
PARENT_POLL_S = 0.5
_PR_SET_PDEATHSIG = 1  # from <linux/prctl.h>


# ---------------------------------------------------------------------------------------
# Checks made before anything is written


def data_fingerprint(config: StudyConfig) -> str:
    """Fingerprint of the study's data contents (``Dataset.fingerprint``)."""
    return load_dataset(config).fingerprint


def _data_name(config: StudyConfig) -> str:
    path = config.data_path()
    return repr(config.data.source) if path is None else repr(str(path))


def check_compatible(config: StudyConfig, records: dict[str, dict], out_dir: str | Path,
                     fingerprint: str | None = None) -> None:
    """Refuse to mix runs of a different study into ``out_dir``.

    A stored run must have the study's training fingerprint (data settings, model, budget),
    the same ensemble settings for its arm, and a ``data_fingerprint`` equal to the current
    data's (``fingerprint``, computed by :func:`data_fingerprint` when None): data files
    replaced at the same path are caught here. A run without ``data_fingerprint`` predates
    data fingerprints; whether it used the same data cannot be checked, so it is refused too.

    Raises:
        StudyConfigError: naming the run, what differs and what to do.
    """
    if not records:
        return
    accepted = config.accepted_fingerprints()
    runs = str(storage.runs_dir(out_dir))
    for key, record in records.items():
        if record.get("fingerprint") not in accepted:
            raise StudyConfigError(
                f"study config: {str(out_dir)!r} holds run {key!r} from a study with different "
                f"data, model or budget settings{_what_changed(config, out_dir)}; use a new "
                f"--out directory or delete {runs!r}")
    fingerprint = data_fingerprint(config) if fingerprint is None else fingerprint
    for key, record in records.items():
        theirs = record.get("data_fingerprint")
        if not theirs:
            raise StudyConfigError(
                f"study config: {str(out_dir)!r} holds run {key!r}, made before runs recorded "
                "a fingerprint of their data, so whether it used the same data cannot be "
                f"checked; use a new --out directory, or move {runs!r} aside to redo the runs")
        if theirs != fingerprint:
            raise StudyConfigError(
                f"study config: the data changed since the runs in {str(out_dir)!r} were made: "
                f"data {_data_name(config)} has fingerprint {fingerprint}, run {key!r} was "
                f"made on data with fingerprint {theirs}. Mixing them would compare runs "
                "trained on different data; use a new --out directory for the new data, or "
                "restore the old data to finish the old study")
    for key, record in records.items():
        arm = config.arm(record["arm"])
        if record.get("recipe_fingerprint") != arm.recipe_fingerprint():
            raise StudyConfigError(
                f"study config: {str(out_dir)!r} holds run {key!r} made with another recipe "
                f"for arm {arm.name!r} (regulariser, optimiser, fixed values or groups "
                f"changed in [arms.{arm.name}]); use a new --out directory, rename the arm, "
                f"or delete that arm's runs ({arm.name}-*.json) from {runs!r}")
    for key, record in records.items():
        wanted = config.ensemble_settings(record["arm"])
        if record.get("ensemble_settings") != wanted:
            raise StudyConfigError(
                f"study config: {str(out_dir)!r} holds run {key!r} made with ensemble settings "
                f"{record.get('ensemble_settings')}, the study asks for {wanted} "
                f"([arms.{record['arm']}.ensemble]); use a new --out directory or delete that "
                f"arm's runs ({record['arm']}-*.json) from {runs!r}")
    _warn_other_versions(records, out_dir)


def _warn_other_versions(records: dict[str, dict], out_dir: str | Path) -> None:
    """Warn (once) when stored runs were made by another holonomic version (or before runs
    recorded it): the integrators may have changed, and a resumed study would mix runs of
    both versions. A warning, not a refusal: the runs stay usable for a report."""
    import holonomic

    others = sorted({str(r.get("holonomic_version", "")) for r in records.values()}
                    - {holonomic.__version__})
    if others:
        named = [f"holonomic {v}" if v else "a version that was not recorded" for v in others]
        warnings.warn(
            f"{str(out_dir)!r} holds runs made by {' and '.join(named)}, this is "
            f"{holonomic.__version__}; new runs would be mixed with them. For a study made "
            "by one version, use a new --out directory", UserWarning, stacklevel=3)


#: Parts of the study definition (``DIR/study.json``) that the training fingerprint covers.
_FINGERPRINTED = ("data", "model", "budget", "arm_constrain", "model_source")


def _flatten(value, prefix: str, out: dict) -> dict:
    if isinstance(value, dict):
        for key, item in value.items():
            _flatten(item, f"{prefix}.{key}" if prefix else str(key), out)
    else:
        out[prefix] = value
    return out


def definition_changes(stored: dict, current: dict) -> list[str]:
    """``"budget.epochs: 3 -> 4"`` for every differing key of the fingerprinted parts of two
    study definitions (``"(absent)"`` for a key one of them lacks), sorted."""
    old = _flatten({k: stored.get(k) for k in _FINGERPRINTED if stored.get(k) is not None},
                   "", {})
    new = _flatten({k: current.get(k) for k in _FINGERPRINTED if current.get(k) is not None},
                   "", {})
    missing = "(absent)"
    return [f"{key}: {old.get(key, missing)!r} -> {new.get(key, missing)!r}"
            for key in sorted(set(old) | set(new))
            if _normal(old.get(key, missing)) != _normal(new.get(key, missing))]


def _normal(value):
    return list(value) if isinstance(value, tuple) else value


def _what_changed(config: StudyConfig, out_dir: str | Path) -> str:
    """`` (changed: budget.epochs: 3 -> 4)``, from the definition in ``DIR/study.json``, or
    an empty string when there is none to compare with (or nothing differs there)."""
    from holonomic.study import study_definition

    path = Path(out_dir) / storage.STUDY_RECORD
    try:
        stored = storage.loads(path.read_text(encoding="utf-8")).get("definition") or {}
        stored = storage.loads(storage.dumps(stored))
        current = storage.loads(storage.dumps(study_definition(config, None)))
    except (OSError, ValueError, AttributeError):
        return ""
    changes = definition_changes(stored, current)
    return f" (changed since {str(path)!r}: {'; '.join(changes)})" if changes else ""


#: Rows of the data a factory's model is tried on before a study starts (:func:`check_forward`).
_PROBE_ROWS = 4


def check_forward(config: StudyConfig, model: torch.nn.Module, rows, n_outputs: int,
                  dtype: torch.dtype) -> None:
    """One forward pass of a factory's ``model`` on ``rows`` (the first rows of the data,
    shape ``(n, in_features)``, in the budget's dtype; a missing value as 0), in eval mode
    without gradients, as the runner feeds it. The output must have shape
    ``(n, n_outputs)`` (``(n,)`` is also accepted for regression's single output).

    Raises:
        StudyConfigError: naming ``model.factory``, the expected and actual shapes, or the
            forward pass's error (its text, not a traceback).
    """
    import numpy as np

    from holonomic.study.loop import evaluation_mode

    x = torch.as_tensor(np.nan_to_num(np.asarray(rows, dtype=np.float64)), dtype=dtype)
    n, in_features = int(x.shape[0]), int(x.shape[1])
    factory = config.model.factory
    what = (f"{n_outputs} classes" if n_outputs > 1 else "regression: 1 output")
    try:
        with evaluation_mode(model):
            out = model(x)
    except Exception as exc:  # noqa: BLE001 - reported with its text, as a config error
        raise StudyConfigError(
            f"study config: 'model.factory' {factory!r}: the model's forward pass fails on "
            f"the study's inputs, a {config.budget.dtype} tensor of shape (n, {in_features}) "
            f"(n rows of {in_features} features; tried n = {n}): "
            f"{type(exc).__name__}: {exc}") from None
    shape = tuple(getattr(out, "shape", ()))
    if not isinstance(out, torch.Tensor):
        raise StudyConfigError(
            f"study config: 'model.factory' {factory!r}: the model's forward pass returned "
            f"{type(out).__name__}, not a tensor of shape ({n}, {n_outputs}) ({what})")
    ok = shape == (n, n_outputs) or (n_outputs == 1 and shape == (n,))
    if not ok:
        raise StudyConfigError(
            f"study config: 'model.factory' {factory!r}: the model's output has shape "
            f"{shape} for {n} input rows; expected ({n}, {n_outputs}) ({what}): the "
            "factory must build a model with n_outputs outputs (its second argument)")


def check_model(config: StudyConfig, dataset=None) -> None:
    """Build a user factory's model once (with the study file's folder on the import path),
    so a factory that cannot be imported, has the wrong signature or returns no module is
    refused before anything is written, and try it on the first rows of the data
    (:func:`check_forward`: the forward pass runs, the output has one column per class or
    a single one for regression); then every arm's layer selection
    (:func:`holonomic.study.arms.check_layer_selections`).

    Torch runs single-threaded meanwhile: a parent that forks workers must not have started
    torch's thread pool.
    """
    dataset = load_dataset(config) if dataset is None else dataset
    n_outputs = int(dataset.n_classes) or 1  # 1 output for regression
    in_features = int(dataset.x.shape[1])
    threads = torch.get_num_threads()
    torch.set_num_threads(1)
    try:
        with import_path(config.base_dir):
            if config.model.factory is not None:
                dtype = torch.float64 if config.budget.dtype == "float64" else torch.float32
                model = build_model(config.model, in_features, n_outputs, config.seeds[0],
                                    dtype)
                check_forward(config, model, dataset.x[:_PROBE_ROWS], n_outputs, dtype)
            check_layer_selections(config, in_features, n_outputs)
    finally:
        torch.set_num_threads(threads)


def prepare_runs(config: StudyConfig, out_dir: str | Path, specs: Sequence[RunSpec],
                 invalid: list[storage.InvalidRunRecord] | None = None) -> dict[str, dict]:
    """Every check a study makes before writing: load the data, read and validate the
    stored runs of ``specs``, check that they belong to this study and that the model can
    be built. Creates nothing. Returns the stored runs by key.

    With ``invalid`` a list, invalid run files are collected there (and left out) instead
    of raising :class:`~holonomic.study.storage.InvalidRunRecord`.
    """
    storage.check_output_dir(out_dir)
    dataset = load_dataset(config)
    done = storage.read_records(out_dir, [s.key for s in specs], invalid)
    check_compatible(config, done, out_dir, dataset.fingerprint)
    check_model(config, dataset)
    return done


# ---------------------------------------------------------------------------------------
# Running


def _execute(config: StudyConfig, spec: RunSpec, out_dir: str) -> str:
    """Train one run and store its record (its audit file is in place before).

    The study file's folder is on the import path meanwhile (for a model factory beside
    it); the record carries the data fingerprint; a full disk or an unwritable file is a
    :class:`~holonomic.study.storage.StudyOutputError` naming the file.
    """
    with storage.output_errors(default=f"the files of run {spec.key} under {out_dir}"):
        with import_path(config.base_dir if config.model.factory is not None else None):
            record = train_run(config, spec, out_dir=out_dir)
        storage.write_record(out_dir, record)
    return spec.key


def _exit_with_parent(parent_pid: int, kernel_signal: bool = True) -> None:
    """End this process when ``parent_pid`` is no longer its parent (the parent died):
    on Linux the kernel sends SIGTERM (``prctl(PR_SET_PDEATHSIG)``, unless ``kernel_signal``
    is False); everywhere a daemon thread checks ``os.getppid()`` every
    :data:`PARENT_POLL_S` seconds and calls ``os._exit(1)``."""
    if kernel_signal and sys.platform.startswith("linux"):
        try:
            libc = ctypes.CDLL(None, use_errno=True)
            libc.prctl(ctypes.c_int(_PR_SET_PDEATHSIG), ctypes.c_ulong(signal.SIGTERM),
                       ctypes.c_ulong(0), ctypes.c_ulong(0), ctypes.c_ulong(0))
        except (OSError, AttributeError):  # no prctl here: the watcher below still works
            pass
    if os.getppid() != parent_pid:  # the parent died before the request took effect
        os._exit(1)

    def watch() -> None:
        while True:
            time.sleep(PARENT_POLL_S)
            if os.getppid() != parent_pid:
                os._exit(1)

    threading.Thread(target=watch, name="holonomic-parent-watch", daemon=True).start()


#: Signals held back while workers are forked (:func:`_signals_blocked`).
_HELD_SIGNALS = tuple(getattr(signal, name) for name in ("SIGINT", "SIGTERM", "SIGHUP")
                      if hasattr(signal, name))


@contextlib.contextmanager
def _signals_blocked() -> Iterator[None]:
    """Hold SIGINT, SIGTERM and SIGHUP while the pool forks its workers.

    A forked worker starts with the parent's Python handlers (SIGTERM would raise
    :class:`StudyTerminated` inside the worker and print a traceback) until
    :func:`_worker_init` resets them; with the signals blocked across the fork, the worker
    inherits the block and receives them only after its reset (:func:`_worker_init`
    unblocks), and the parent receives one that arrived meanwhile when the block ends.
    Where ``pthread_sigmask`` is missing (Windows, spawn) this does nothing.
    """
    if not hasattr(signal, "pthread_sigmask"):
        yield
        return
    previous = signal.pthread_sigmask(signal.SIG_BLOCK, _HELD_SIGNALS)
    try:
        yield
    finally:
        signal.pthread_sigmask(signal.SIG_SETMASK, previous)


def _worker_init(parent_pid: int | None = None) -> None:
    """Set up a worker: torch single-threaded; Ctrl-C left to the parent (which stops the
    pool); SIGTERM / SIGHUP end the worker (a handler inherited through ``fork`` is reset);
    exit when the parent dies (:func:`_exit_with_parent`)."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    for name in ("SIGTERM", "SIGHUP"):
        if hasattr(signal, name):
            signal.signal(getattr(signal, name), signal.SIG_DFL)
    if hasattr(signal, "pthread_sigmask"):  # held across the fork (_signals_blocked)
        signal.pthread_sigmask(signal.SIG_UNBLOCK, _HELD_SIGNALS)
    torch.set_num_threads(1)
    os.environ.setdefault("OMP_NUM_THREADS", "1")
    if parent_pid is not None:
        _exit_with_parent(parent_pid)


def _context():
    """``fork`` where available (workers start at once: torch is already imported; the
    parent has run no multi-threaded torch computation), else ``spawn``."""
    if "fork" in get_all_start_methods():
        return get_context("fork")
    return get_context("spawn")


def usable_cpus() -> int:
    """CPUs this process may run on (its affinity mask where the platform has one)."""
    try:
        return len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        return os.cpu_count() or 1


def _stop_pool(pool: ProcessPoolExecutor) -> None:
    """Cancel what is queued and terminate the workers now (their runs in flight are lost;
    finished runs are stored)."""
    processes = list((getattr(pool, "_processes", None) or {}).values())
    pool.shutdown(wait=False, cancel_futures=True)
    for process in processes:
        if process.is_alive():
            process.terminate()
    deadline = time.monotonic() + 5.0
    for process in processes:
        process.join(max(0.0, deadline - time.monotonic()))
        if process.is_alive():
            process.kill()
            process.join(1.0)


def _run_pool(config: StudyConfig, pending: Sequence[RunSpec], out_dir: str, workers: int,
              execute: Callable[[StudyConfig, RunSpec, str], str], bar) -> None:
    pool = ProcessPoolExecutor(max_workers=workers, mp_context=_context(),
                               initializer=_worker_init, initargs=(os.getpid(),))
    try:
        with _signals_blocked():  # the workers are forked here (see _signals_blocked)
            futures = {pool.submit(execute, config, spec, out_dir) for spec in pending}
        while futures:
            finished, futures = wait(futures, return_when=FIRST_COMPLETED)
            for future in finished:
                future.result()
                bar.update(1)
    except BaseException:
        _stop_pool(pool)
        raise
    pool.shutdown(wait=True)


def run_all(config: StudyConfig, out_dir: str | Path, workers: int = 1,
            progress: bool = True, specs: Sequence[RunSpec] | None = None,
            execute: Callable[[StudyConfig, RunSpec, str], str] = _execute,
            done: dict[str, dict] | None = None) -> dict[str, dict]:
    """Run every run not yet stored under ``out_dir/runs`` and return all records.

    Finished runs are skipped, so an interrupted study resumes where it stopped. Nothing is
    created or written until :func:`prepare_runs` has passed (``done``: its result, when the
    caller has already prepared these ``specs``; it is then not prepared again). With ``workers > 1`` runs go
    to a pool of processes (torch single-threaded in each) that end with the parent (see
    the module docstring). A progress bar (tqdm, to stderr) shows the count and an ETA.

    Raises:
        StudyConfigError: refused before writing (data, stored runs, model), or
            :class:`~holonomic.study.storage.StudyOutputError` while writing.
    """
    if workers < 1:
        raise ValueError(f"workers must be >= 1, got {workers}")
    out_dir = str(out_dir)
    specs = plan_runs(config) if specs is None else list(specs)
    keys = [s.key for s in specs]
    if done is None:
        done = prepare_runs(config, out_dir, specs)
    storage.make_output_dir(out_dir)
    with storage.output_errors():
        storage.runs_dir(out_dir).mkdir(exist_ok=True)
        storage.audits_dir(out_dir).mkdir(exist_ok=True)
    storage.remove_stale_temporaries(out_dir)
    pending = [s for s in specs if s.key not in done]

    from tqdm.auto import tqdm

    bar = tqdm(total=len(specs), initial=len(specs) - len(pending), disable=not progress,
               desc=f"study {config.name}", unit="run", dynamic_ncols=True)
    try:
        if workers == 1 or len(pending) <= 1:
            for spec in pending:
                execute(config, spec, out_dir)
                bar.update(1)
        else:
            _run_pool(config, pending, out_dir, workers, execute, bar)
    finally:
        bar.close()
    return storage.read_records(out_dir, keys)


# ---------------------------------------------------------------------------------------
# Successive halving

#: File of ``--out`` recording a successive-halving study's rung: kept and dropped trials.
HALVING_RECORD = "halving.json"


def halving_rung(config: StudyConfig) -> list[RunSpec]:
    """The rung runs of ``study.halving``: every trial of every arm with more than one
    trial, every seed, at ``budget_fraction = config.halving``."""
    return [spec for spec in plan_runs(config, config.halving)
            if len(config.arm(spec.arm).trials) > 1]


def halving_survivors(config: StudyConfig, records: dict[str, dict], metric: str,
                      higher_is_better: bool) -> tuple[dict[str, list[int]],
                                                       dict[str, list[float]]]:
    """Per arm, the trials that continue: the better half (``ceil(n / 2)``) by the mean
    over seeds of the rung runs' validation ``metric`` (a trial with a failed or diverged
    seed ranks last; ties keep trial order). Arms with one trial keep it without a rung.
    Returns ``(kept trial indices per arm, rung means per arm)``."""
    kept: dict[str, list[int]] = {}
    means: dict[str, list[float]] = {}
    for arm in config.arms:
        n = len(arm.trials)
        if n == 1:
            kept[arm.name], means[arm.name] = [0], []
            continue
        values = []
        for trial in arm.trials:
            runs = [records[RunSpec(arm.name, trial.index, trial.settings, seed,
                                    config.halving).key] for seed in config.seeds]
            scores = [float(r["metrics"].get(metric, math.nan)) for r in runs]
            ok = all(r["status"] == "ok" for r in runs) and all(map(math.isfinite, scores))
            values.append(sum(scores) / len(scores) if ok else math.nan)
        sign = -1.0 if higher_is_better else 1.0
        order = sorted(range(n), key=lambda i: (math.isnan(values[i]),
                                                sign * values[i] if not math.isnan(values[i])
                                                else 0.0, i))
        kept[arm.name] = sorted(order[:math.ceil(n / 2)])
        means[arm.name] = values
    return kept, means


def halving_full_runs(config: StudyConfig, records: dict[str, dict],
                      ) -> tuple[list[RunSpec], dict[str, list[int]], dict[str, list[float]],
                                 str]:
    """The full runs successive halving trains after its rung (``records`` holds every rung
    run): ``(specs, kept trials per arm, rung means per arm, selection metric)``."""
    from holonomic.study.config import selection_metric
    from holonomic.study.runner import study_task

    task = study_task(config)
    metric = selection_metric(config, task)
    kept, means = halving_survivors(config, records, metric,
                                    task.higher_is_better(metric.removeprefix("val_")))
    full = [spec for spec in plan_runs(config) if spec.trial in kept[spec.arm]]
    return full, kept, means, metric


def run_halving(config: StudyConfig, out_dir: str | Path, workers: int = 1,
                progress: bool = True, done: dict[str, dict] | None = None,
                ) -> dict[str, dict]:
    """Successive halving (``study.halving = f``): every trial of every arm (with more
    than one trial) first trains for ``round(f * epochs)`` epochs of the full-length
    schedule, every seed; per arm the better half by mean validation metric (the study's
    selection) is then rerun in full from scratch (deterministic: its first epochs equal
    the rung run's). The rung's kept and dropped trials are written to
    ``out_dir/halving.json``. Returns every record, rung runs (``budget_fraction = f``)
    and full runs."""
    rung = halving_rung(config)
    records = run_all(config, out_dir, workers, progress, specs=rung, done=done)
    full, kept, means, metric = halving_full_runs(config, records)
    storage.atomic_write_text(Path(out_dir) / HALVING_RECORD, storage.dumps({
        "fraction": config.halving, "metric": metric,
        "kept": kept,
        "dropped": {arm.name: [t.index for t in arm.trials if t.index not in kept[arm.name]]
                    for arm in config.arms},
        "rung_means": means}))
    records.update(run_all(config, out_dir, workers, progress, specs=full, done=done))
    return records


# ---------------------------------------------------------------------------------------
# Signals in the parent


class StudyTerminated(BaseException):
    """The study process got SIGTERM or SIGHUP (see :func:`terminate_on_signals`).

    A ``BaseException`` like ``KeyboardInterrupt``: it stops the study wherever it is, the
    worker pool is stopped and finished runs stay stored. ``exit_status`` is ``128 +
    signal number`` (143 for SIGTERM), the shell's convention.
    """

    def __init__(self, signum: int) -> None:
        self.signum = int(signum)
        super().__init__(f"terminated by {signal.Signals(self.signum).name}")

    @property
    def exit_status(self) -> int:
        return 128 + self.signum

    def __reduce__(self):
        return (type(self), (self.signum,))


@contextlib.contextmanager
def terminate_on_signals(names: Sequence[str] = ("SIGTERM", "SIGHUP")) -> Iterator[None]:
    """Within the block, the signals ``names`` raise :class:`StudyTerminated` in the main
    thread (so the pool is stopped and the command can exit with a message); the previous
    handlers are restored afterwards. Outside the main thread this does nothing."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return

    def handler(signum, frame):
        raise StudyTerminated(signum)

    previous = {}
    try:
        for name in names:
            if hasattr(signal, name):
                number = getattr(signal, name)
                previous[number] = signal.signal(number, handler)
        yield
    finally:
        for number, old in previous.items():
            signal.signal(number, old)
