"""Running fits as tasks: in this process, in a pool of processes, or on a Dask cluster.

A :class:`Task` is one subject (or a pooled set of subjects) × one template, with the
keyword arguments of :func:`compartments.estimate.hybrid.fit` (its own seed included).
:func:`run_task` carries it out anywhere — here, in a worker process, on a Dask worker —
and always returns an :class:`Outcome`: a fit that raises a
:class:`~compartments.errors.CompartmentsError`, raises anything else or runs past its
time limit becomes a failed :class:`~compartments.results.FitResult` with the reason,
so one subject never stops a run.

:func:`execute` runs tasks serially (``workers=1``), in a
:class:`concurrent.futures.ProcessPoolExecutor` (``workers > 1``; one torch thread and
one BLAS thread per worker) or on an existing Dask distributed cluster
(``scheduler="tcp://host:port"``) and hands each outcome to a callback in the calling
process, in the order the fits finish. Results do not depend on where a task ran: each
task carries its own seed (:func:`task_seed`), and numeric libraries run one thread per
fit (``OMP_NUM_THREADS=1`` and friends in workers; torch set to one thread where loaded).

Time limits
-----------
A task with ``timeout`` set is stopped from inside: by ``SIGALRM`` in a process's main
thread (this process when serial, each pool worker) and by an exception raised into the
thread otherwise (Dask worker threads). Both act between Python steps, so a single long
call into compiled code finishes before the stop takes effect. In a process pool the
parent also watches the clock and, if a worker stays busy well past the limit
(``2 × timeout + 5 s``), stops the workers and records that fit as timed out; the other
fits are run again in a fresh pool. Serial runs and Dask have only the stop from inside.
"""

from __future__ import annotations

import contextlib
import ctypes
import hashlib
import multiprocessing
import os
import signal
import sys
import threading
import time
from collections.abc import Callable, Iterator, Mapping, Sequence
from concurrent.futures import FIRST_COMPLETED, Future, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass, field, fields, is_dataclass
from typing import Any

from .errors import CompartmentsError, UsageError
from .estimate.hybrid import failed_result, fit
from .results import FitResult
from .study import Subject
from .template import Template

__all__ = ["FitTimeout", "Outcome", "Task", "deadline", "execute", "run_task", "task_seed"]

#: Environment variables that cap the threads of numeric libraries in worker processes.
THREAD_VARIABLES = ("OMP_NUM_THREADS", "MKL_NUM_THREADS", "OPENBLAS_NUM_THREADS")
#: A task whose worker crashes is tried this many times before it is recorded as failed.
MAX_ATTEMPTS = 2
#: Seconds added to twice the time limit before a pool worker is stopped from outside.
HARD_GRACE = 5.0
#: How long to try to reach a Dask scheduler before giving up.
CONNECT_TIMEOUT = "20s"
#: Seconds between repeats of a stop that has not yet taken effect.
REPEAT = 0.05

OutcomeCallback = Callable[["Outcome"], None]


class FitTimeout(BaseException):
    """Raised inside a fit when its time is up.

    A :class:`BaseException` so that no ``except Exception`` in numeric code swallows it.
    """


# --------------------------------------------------------------------------- tasks


def task_seed(seed: int, subject: str, model: str) -> int:
    """The seed of one subject × model fit, derived from the run's seed.

    The same run seed, subject id and model name give the same seed on every machine
    and in every process (SHA-256, not Python's per-process salted ``hash``).

    Parameters
    ----------
    seed : int
        The run's seed.
    subject : str
        Subject id (``"pooled"`` for a pooled fit).
    model : str
        Template name.

    Returns
    -------
    int
        In ``[0, 2**32)``, valid for numpy and torch.

    Examples
    --------
    >>> task_seed(0, "1", "one-comp-oral") == task_seed(0, "1", "one-comp-oral")
    True
    >>> task_seed(0, "1", "one-comp-oral") != task_seed(1, "1", "one-comp-oral")
    True
    """
    text = f"compartments-task\x00{int(seed)}\x00{subject}\x00{model}"
    return int.from_bytes(hashlib.sha256(text.encode("utf-8")).digest()[:4], "big")


def _payload(subject: Any) -> Any:
    """A picklable stand-in for a subject.

    :class:`~compartments.study.Subject` keeps its covariates in a read-only
    ``MappingProxyType``, which the standard pickle cannot carry; the fields travel as a
    plain dict and the subject is rebuilt on the other side.
    """
    if isinstance(subject, Subject) and is_dataclass(subject):
        values = {f.name: getattr(subject, f.name) for f in fields(subject)}
        values["covariates"] = dict(values["covariates"])
        return ("subject", values)
    return ("object", subject)


def _unpayload(item: Any) -> Any:
    kind, value = item
    return Subject(**value) if kind == "subject" else value


@dataclass(frozen=True)
class Task:
    """One fit to run: a subject (or pooled subjects) × a template.

    Attributes
    ----------
    subject : str
        Subject id, or ``"pooled"``.
    model : str
        Template name.
    template : Template
    data : tuple
        Picklable stand-ins of the subjects (see :meth:`from_subjects`).
    options : Mapping
        Keyword arguments of :func:`~compartments.estimate.hybrid.fit`, ``seed`` included.
    timeout : float or None, s
        Time limit of the fit.
    pooled : bool
        Fit one parameter set to all subjects in ``data``.
    """

    subject: str
    model: str
    template: Template
    data: tuple[Any, ...]
    options: Mapping[str, Any] = field(default_factory=dict)
    timeout: float | None = None
    pooled: bool = False

    @classmethod
    def from_subjects(cls, subjects: Sequence[Any], template: Template, options: Mapping[str, Any], *,
                      timeout: float | None = None, pooled: bool = False) -> Task:
        """A task for one subject, or for several pooled ones."""
        label = "pooled" if pooled else str(subjects[0].id)
        return cls(subject=label, model=template.name, template=template,
                   data=tuple(_payload(s) for s in subjects), options=dict(options),
                   timeout=timeout, pooled=pooled)

    @property
    def key(self) -> tuple[str, str]:
        return (self.subject, self.model)

    def subjects(self) -> list[Any]:
        """The subjects, rebuilt."""
        return [_unpayload(d) for d in self.data]

    def failed(self, message: str, wall_time: float = 0.0) -> FitResult:
        """A failed result for this task with ``message`` as the reason."""
        return failed_result(self.template, self.subject, message,
                             error=str(self.options.get("error", "additive")),
                             seed=int(self.options.get("seed", 0)),
                             strategy=str(self.options.get("strategy", "hybrid")), wall_time=wall_time)


@dataclass(frozen=True)
class Outcome:
    """What a task produced.

    Attributes
    ----------
    subject, model : str
    result : FitResult
        Failed ones carry the reason in ``message``.
    final : bool
        False when running the task again could end otherwise (it timed out, its worker
        crashed, or it raised an unexpected exception); a resumed run tries those again.
    """

    subject: str
    model: str
    result: FitResult
    final: bool = True

    @property
    def key(self) -> tuple[str, str]:
        return (self.subject, self.model)


def one_line(exc: BaseException, limit: int = 300) -> str:
    """``"TypeName: first line of the message"``, at most ``limit`` characters."""
    text = str(exc).strip().splitlines()
    line = f"{type(exc).__name__}: {text[0]}" if text else type(exc).__name__
    return line if len(line) <= limit else line[: limit - 3] + "..."


def timeout_message(seconds: float) -> str:
    return (f"timed out after {seconds:g} s; allow more time (fit_timeout / --fit-timeout), "
            "use a simpler model or strategy='nls'")


def run_task(task: Task) -> Outcome:
    """Carry out one task and return its outcome; never raises for a failed fit.

    A :class:`~compartments.errors.CompartmentsError` becomes a failed result with its
    message; any other exception a failed result with its type and first line; running
    past ``task.timeout`` a failed result "timed out after S s". ``KeyboardInterrupt``
    and ``SystemExit`` pass through.
    """
    t0 = time.perf_counter()
    try:
        subjects = task.subjects()
        data = subjects if task.pooled else subjects[0]
        with one_torch_thread(), deadline(task.timeout):
            result = fit(data, task.template, pooled=task.pooled, **task.options)
    except FitTimeout:
        return Outcome(task.subject, task.model,
                       task.failed(timeout_message(task.timeout or 0.0), time.perf_counter() - t0), final=False)
    except CompartmentsError as exc:
        return Outcome(task.subject, task.model, task.failed(str(exc), time.perf_counter() - t0))
    except Exception as exc:  # fault isolation: any other error fails this fit only
        return Outcome(task.subject, task.model,
                       task.failed(f"unexpected error {one_line(exc)}", time.perf_counter() - t0), final=False)
    return Outcome(task.subject, task.model, result)


# --------------------------------------------------------------------------- time limits


@contextlib.contextmanager
def deadline(seconds: float | None) -> Iterator[None]:
    """Raise :class:`FitTimeout` in the current thread once ``seconds`` have passed.

    Examples
    --------
    >>> import time
    >>> try:
    ...     with deadline(0.05):
    ...         while True:
    ...             time.sleep(0.01)
    ... except FitTimeout:
    ...     print("stopped")
    stopped
    """
    if seconds is None:
        yield
        return
    _quiet_unraisable_timeouts()
    if threading.current_thread() is threading.main_thread() and hasattr(signal, "setitimer"):
        with _alarm(float(seconds)):
            yield
    else:
        with _watchdog(float(seconds)):
            yield


def _quiet_unraisable_timeouts() -> None:
    """Keep a stop that lands where Python cannot raise (and repeats) off stderr."""
    hook = sys.unraisablehook
    if getattr(hook, "_compartments", False):
        return

    def quiet(unraisable: Any) -> None:
        if not isinstance(unraisable.exc_value, FitTimeout):
            hook(unraisable)

    quiet._compartments = True  # type: ignore[attr-defined]
    sys.unraisablehook = quiet


@contextlib.contextmanager
def _alarm(seconds: float) -> Iterator[None]:
    # The alarm repeats until disarmed: a stop raised where Python ignores exceptions
    # (a __del__ or weakref callback) is simply raised again a moment later.
    state = {"armed": True}

    def handler(signum: int, frame: Any) -> None:
        if state["armed"]:
            raise FitTimeout()

    previous = signal.signal(signal.SIGALRM, handler)
    signal.setitimer(signal.ITIMER_REAL, seconds, REPEAT)
    try:
        yield
    finally:
        state["armed"] = False
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, previous if previous is not None else signal.SIG_DFL)


def _raise_in_thread(thread_id: int, exc: type[BaseException] | None) -> None:
    """Raise ``exc`` in another thread at its next Python step (``None`` cancels one pending)."""
    ctypes.pythonapi.PyThreadState_SetAsyncExc(ctypes.c_ulong(thread_id),
                                               ctypes.py_object(exc) if exc is not None else None)


@contextlib.contextmanager
def _watchdog(seconds: float) -> Iterator[None]:
    target = threading.get_ident()
    lock = threading.Lock()
    stop = threading.Event()
    state = {"finished": False, "fired": False}

    def watch() -> None:
        wait_for = seconds
        while not stop.wait(wait_for):  # repeated, like the alarm above
            with lock:
                if state["finished"]:
                    return
                state["fired"] = True
                _raise_in_thread(target, FitTimeout)
            wait_for = REPEAT

    watcher = threading.Thread(target=watch, name="compartments-fit-deadline", daemon=True)
    watcher.start()
    try:
        yield
    finally:
        with lock:
            state["finished"] = True
            fired = state["fired"]
        stop.set()
        if fired:
            _raise_in_thread(target, None)  # the fit ended first: drop a stop not yet delivered


# --------------------------------------------------------------------------- threads


@contextlib.contextmanager
def one_torch_thread() -> Iterator[None]:
    """Run with one torch thread (restored afterwards) when torch is loaded.

    Thread counts change the order of floating-point sums, so one thread everywhere keeps
    serial, pool and Dask results identical. Torch is not imported here just for this:
    the estimator loads it only where a stage needs it, and worker processes start with
    ``OMP_NUM_THREADS=1``, which torch takes as its thread count when loaded later.
    """
    torch = sys.modules.get("torch")
    if torch is None:
        yield
        return
    previous = torch.get_num_threads()
    torch.set_num_threads(1)
    try:
        yield
    finally:
        torch.set_num_threads(previous)


def _init_worker() -> None:
    """Pool worker start-up: ignore Ctrl-C (the parent handles it), one thread per library.

    ``OMP_NUM_THREADS``, ``MKL_NUM_THREADS`` and ``OPENBLAS_NUM_THREADS`` are 1 (torch and
    BLAS libraries loaded from now on start with one thread); torch, if already loaded,
    is set to one thread.
    """
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    for name in THREAD_VARIABLES:
        os.environ[name] = "1"
    torch = sys.modules.get("torch")
    if torch is not None:
        torch.set_num_threads(1)
        with contextlib.suppress(RuntimeError):  # already set once in this process
            torch.set_num_interop_threads(1)


@contextlib.contextmanager
def _one_thread_environment() -> Iterator[None]:
    """Set the thread variables while worker processes start (they inherit them)."""
    saved = {name: os.environ.get(name) for name in THREAD_VARIABLES}
    os.environ.update({name: "1" for name in THREAD_VARIABLES})
    try:
        yield
    finally:
        for name, value in saved.items():
            if value is None:
                os.environ.pop(name, None)
            else:
                os.environ[name] = value


# --------------------------------------------------------------------------- executors


def usable_cores() -> int:
    """Cores this process may run on."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not on Linux
        return max(1, os.cpu_count() or 1)


def execute(tasks: Sequence[Task], on_outcome: OutcomeCallback, *, workers: int = 1,
            scheduler: Any = None, fn: Callable[[Task], Outcome] = run_task) -> str:
    """Run ``tasks`` and pass each outcome to ``on_outcome`` as it finishes.

    Parameters
    ----------
    tasks : sequence of Task
    on_outcome : callable
        Called in this process, in the order fits finish. An exception it raises
        (``KeyboardInterrupt`` included) stops the run: unfinished tasks are cancelled,
        worker processes stopped, and the exception passes on.
    workers : int
        1: one after another in this process; more: a pool of that many processes.
    scheduler : str or object, optional
        Address of a Dask distributed scheduler (``"tcp://host:8786"``) or an object
        with a ``scheduler_address`` (a ``LocalCluster``); overrides ``workers``.
    fn : callable
        The function run per task (module-level, so it pickles); default :func:`run_task`.

    Returns
    -------
    str
        How the tasks ran: ``"serial"``, ``"processes"`` or ``"dask"``.
    """
    if scheduler is not None:
        if tasks:
            _execute_dask(tasks, on_outcome, scheduler, fn)
        return "dask"
    if workers <= 1 or len(tasks) <= 1:
        for task in tasks:
            on_outcome(fn(task))
        return "serial"
    _execute_pool(tasks, on_outcome, workers, fn)
    return "processes"


def _pool_context() -> multiprocessing.context.BaseContext:
    """forkserver where available (workers fork from a clean server that has the numeric
    modules loaded), else spawn; never plain fork from a process that may hold threads."""
    if "forkserver" in multiprocessing.get_all_start_methods():
        ctx = multiprocessing.get_context("forkserver")
        ctx.set_forkserver_preload(["compartments.execution"])
        return ctx
    return multiprocessing.get_context("spawn")  # pragma: no cover - Windows


def _stop_pool(pool: ProcessPoolExecutor) -> None:
    """Cancel queued tasks and stop the worker processes now."""
    processes = list(getattr(pool, "_processes", {}).values())
    pool.shutdown(wait=False, cancel_futures=True)
    for p in processes:
        with contextlib.suppress(Exception):
            p.kill()
    for p in processes:
        with contextlib.suppress(Exception):
            p.join(timeout=5)


def _execute_pool(tasks: Sequence[Task], on_outcome: OutcomeCallback, workers: int,
                  fn: Callable[[Task], Outcome]) -> None:
    ctx = _pool_context()
    attempts: dict[tuple[str, str], int] = {}
    queue = list(tasks)
    with _one_thread_environment():
        while queue:
            pool = ProcessPoolExecutor(max_workers=min(workers, len(queue)), mp_context=ctx,
                                       initializer=_init_worker)
            try:
                queue = _drain_pool(pool, queue, on_outcome, fn, attempts)
            except BaseException:
                _stop_pool(pool)
                raise
            else:
                pool.shutdown(wait=True)


def _drain_pool(pool: ProcessPoolExecutor, queue: list[Task], on_outcome: OutcomeCallback,
                fn: Callable[[Task], Outcome], attempts: dict[tuple[str, str], int]) -> list[Task]:
    """Run ``queue`` in ``pool``; return the tasks to run again in a fresh pool."""
    futures: dict[Future[Outcome], Task] = {pool.submit(fn, t): t for t in queue}
    order = {f: i for i, f in enumerate(futures)}
    limits = {f: 2 * t.timeout + HARD_GRACE for f, t in futures.items() if t.timeout is not None}
    seen_running: dict[Future[Outcome], float] = {}
    pending = set(futures)
    again: list[Task] = []
    while pending:
        done, pending = wait(pending, timeout=0.5 if limits else None, return_when=FIRST_COMPLETED)
        broken = False
        for f in sorted(done, key=order.__getitem__):
            task = futures[f]
            try:
                outcome = f.result()
            except BrokenProcessPool:
                broken = True
                attempts[task.key] = attempts.get(task.key, 0) + 1
                if attempts[task.key] >= MAX_ATTEMPTS:
                    on_outcome(Outcome(task.subject, task.model, task.failed(
                        f"the worker process stopped unexpectedly ({attempts[task.key]} attempts); "
                        "the fit may need more memory than the machine has"), final=False))
                else:
                    again.append(task)
                continue
            except Exception as exc:  # the task's result could not come back (e.g. pickling)
                outcome = Outcome(task.subject, task.model, task.failed(f"unexpected error {one_line(exc)}"),
                                  final=False)
            on_outcome(outcome)
        if broken:
            _stop_pool(pool)
            return again + [futures[f] for f in pending]
        if not limits:
            continue
        now = time.monotonic()
        for f in pending:
            if f.running():
                seen_running.setdefault(f, now)
        overdue = [f for f in pending if f in seen_running and now - seen_running[f] > limits.get(f, float("inf"))]
        if overdue:
            _stop_pool(pool)
            for f in overdue:
                task = futures[f]
                on_outcome(Outcome(task.subject, task.model,
                                   task.failed(timeout_message(task.timeout or 0.0) + " (the worker was stopped)"),
                                   final=False))
            return again + [futures[f] for f in futures if f in pending and f not in overdue]
    return again


def _dask() -> Any:
    try:
        import distributed
    except ImportError:
        raise UsageError(
            "running on a Dask cluster needs the 'distributed' package; install it with "
            "pip install 'compartments[cluster]', or run without a scheduler"
        ) from None
    return distributed


def _execute_dask(tasks: Sequence[Task], on_outcome: OutcomeCallback, scheduler: Any,
                  fn: Callable[[Task], Outcome]) -> None:
    distributed = _dask()
    address = getattr(scheduler, "scheduler_address", scheduler)
    try:
        client = distributed.Client(address, timeout=CONNECT_TIMEOUT)
    except (OSError, TimeoutError, ValueError) as exc:
        raise UsageError(
            f"cannot reach the Dask scheduler at {address}: {one_line(exc)}; start one with "
            "'dask scheduler' and workers with 'dask worker ADDRESS', then pass its address"
        ) from None
    futures: list[Any] = []
    try:
        by_key: dict[str, Task] = {}
        for task in tasks:
            fut = client.submit(fn, task, pure=False)
            by_key[fut.key] = task
            futures.append(fut)
        for fut in distributed.as_completed(futures):
            task = by_key[fut.key]
            try:
                outcome = fut.result()
            except Exception as exc:  # the worker died or the result could not come back
                outcome = Outcome(task.subject, task.model,
                                  task.failed(f"the Dask worker could not run this fit: {one_line(exc)}"),
                                  final=False)
            on_outcome(outcome)
    except BaseException:
        with contextlib.suppress(Exception):
            client.cancel(futures)
        raise
    finally:
        with contextlib.suppress(Exception):
            client.close()
