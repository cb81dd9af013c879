"""The worker process: an rq worker on the closure queue, JSON serializer, scheduler on.

Lost work is found quickly: the started-task registry entry of a running task lives only
``monitoring_interval + abandon_grace`` seconds past the last heartbeat (rq's default is 60 s
past), and workers clean the registry every ``maintenance_interval`` seconds, so a task whose
worker and work-horse were both killed is re-queued within about
``monitoring_interval + abandon_grace + maintenance_interval`` seconds. A killed work-horse
alone is seen at once by its worker and retried.
"""

from __future__ import annotations

import contextlib
import logging
import os
import socket
import time

import redis
from rq import Worker
from rq.serializers import JSONSerializer

from worker import queue as q
from worker import tasks

log = logging.getLogger("closure.worker")


class ClosureWorker(Worker):
    """rq Worker whose running-task heartbeats expire after a short grace period, and which
    prepares a job's per-process caches once before forking the work-horses of its tasks."""

    abandon_grace_s: int = 10
    stop_asked: bool = False
    _warmed: tuple[str, ...] = ()

    def execute_job(self, job, queue):
        self._warm_for(job)
        return super().execute_job(job, queue)

    def _warm_for(self, job) -> None:
        """Build the job's term library (sympy code generation) and coarse-graining in this
        process, so every work-horse forked for the job inherits them instead of redoing it
        (about 0.1 s per task). No data is read and no numerical work is done here. Best
        effort: if it fails, the horse simply builds them itself."""
        job_id = (job.args or [None])[0]
        if not isinstance(job_id, str) or job_id in self._warmed \
                or job.func_name == "worker.tasks.plan_task":
            return
        self._warmed = (*self._warmed[-15:], job_id)
        try:
            from closure.grid import Grid
            from closure.spec import parse_spec
            from closure.store import read_json

            work = tasks.store().job_dir(job_id)
            spec = parse_spec(read_json(work / "spec.json"))
            plan = read_json(work / "plan.json")
            from closure import pipeline

            grid = Grid.from_dict(plan["grid"])
            # the pipeline's own per-process caches (no public hook for this yet)
            pipeline._library(spec, grid.dims)._compiled()
            pipeline._coarse_graining(spec, grid)
        except Exception as exc:  # noqa: BLE001 - an optimisation only
            log.debug("no warm-up for %s: %s", job_id, exc)

    def fork_work_horse(self, job, queue):
        self._worker_pid = os.getpid()
        return super().fork_work_horse(job, queue)

    def main_work_horse(self, job, queue):
        """The work-horse dies with its worker: rq puts it in its own process group, so a
        worker killed with SIGKILL would otherwise leave it running beside the copy of its
        task that the queue re-runs."""
        die_with_parent(getattr(self, "_worker_pid", None))
        return super().main_work_horse(job, queue)

    def monitor_work_horse(self, job, queue, execution):
        """rq's monitoring; once the horse has exited (done, failed or killed), a lease it
        still holds is void: drop it so a retry need not wait for it to expire."""
        pid = self.horse_pid
        try:
            return super().monitor_work_horse(job, queue, execution)
        finally:
            with contextlib.suppress(redis.RedisError):
                q.release_dead_lease(self.connection, job.id, self.name, pid)

    #: seconds between store sweeps (closure.store.Store.sweep) of a running worker
    sweep_interval_s: float = 600.0
    _swept_at: float = 0.0

    def run_maintenance_tasks(self):
        """rq's registry cleaning, and now and then a sweep of the store's leftovers."""
        super().run_maintenance_tasks()
        if time.monotonic() - self._swept_at >= self.sweep_interval_s:
            self._swept_at = time.monotonic()
            try:
                removed = tasks.store().sweep()
            except Exception as exc:  # noqa: BLE001 - housekeeping must not stop the worker
                log.warning("store sweep failed: %s", exc)
                removed = []
            finally:
                tasks.store().close()  # no pooled connection for the next horse to inherit
            if removed:
                log.info("removed %d leftover(s) from the store", len(removed))

    def heartbeat(self, timeout=None, pipeline=None):
        """rq's heartbeat, and back into the worker registry if an outage dropped us from it
        (the registry sets, not the worker's own key, are what Worker.count reads)."""
        super().heartbeat(timeout, pipeline)
        if not self.stop_asked:
            from rq import worker_registration

            worker_registration.register(self, pipeline)

    def request_stop(self, signum, frame):
        self.stop_asked = True
        super().request_stop(signum, frame)

    def get_heartbeat_ttl(self, job, working_time: float = 0.0) -> int:
        interval = self.job_monitoring_interval
        if job.timeout and job.timeout > 0:
            interval = min(job.timeout - working_time, interval)
        return int(max(interval, 1)) + self.abandon_grace_s


def die_with_parent(parent_pid: int | None) -> None:
    """Ask the kernel to SIGKILL this process when its parent exits (Linux PR_SET_PDEATHSIG),
    and exit now if the parent is already gone (it died before the request took effect)."""
    import ctypes
    import signal

    with contextlib.suppress(OSError, AttributeError):
        libc = ctypes.CDLL(None, use_errno=True)
        libc.prctl(1, int(signal.SIGKILL), 0, 0, 0)  # PR_SET_PDEATHSIG = 1
    if parent_pid is not None and os.getppid() != parent_pid:
        os._exit(1)


#: modules every task needs: imported once in the worker, so each forked work-horse starts
#: with them loaded (importing them costs about a second per task otherwise)
PRELOAD = ("closure.pipeline", "closure.io", "closure.library", "closure.residuals",
           "closure.stats", "closure.regression", "closure.scores", "closure.model",
           "closure.export", "closure.service.store", "netCDF4", "xarray", "sympy",
           "sklearn.linear_model", "scipy.optimize", "scipy.interpolate", "scipy.integrate",
           "scipy.linalg", "scipy.sparse")


def preload() -> None:
    """Import what tasks use (imports only: no numerical work before forking)."""
    import importlib

    for name in PRELOAD:
        with contextlib.suppress(ImportError):
            importlib.import_module(name)
    with contextlib.suppress(Exception):
        import xarray

        xarray.backends.list_engines()  # backend discovery, cached for every horse
    with contextlib.suppress(Exception):
        from closure import pipeline

        pipeline._threadpools()  # the BLAS thread-limit controller (a library scan, ~20 ms)


def run_worker(redis_url: str, store_root: str, db_url: str | None = None,
               db_schema: str | None = None, *, name: str | None = None, burst: bool = False,
               monitoring_interval: int = 5, abandon_grace: int = 10,
               maintenance_interval: int = 10, with_scheduler: bool = True,
               max_jobs: int | None = None, data_roots=None, log_level: str = "INFO") -> int:
    """Run one worker until SIGTERM/SIGINT (with ``burst``: until the queue is empty; with
    ``max_jobs``: until it has run that many tasks).

    A Redis outage does not end the process: the worker reconnects with backoff and a
    worker that stopped on a lost connection is started again.
    """
    logging.basicConfig(level=log_level, format="%(asctime)s %(name)s %(message)s")
    tasks.configure(store_root, db_url, db_schema, data_roots)
    tasks.store().open()  # fail fast on a bad catalog URL, create the tables
    removed = tasks.store().sweep()  # what killed tasks and uploads left behind
    if removed:
        log.info("removed %d leftover(s) from the store: %s", len(removed),
                 ", ".join(removed[:20]))
    tasks.store().close()  # each work-horse opens its own connections after the fork
    preload()
    base = name or f"closure-{socket.gethostname()}-{os.getpid()}"
    attempt = 0
    while True:
        conn = q.connect(redis_url)
        worker = ClosureWorker(
            [q.QUEUE_NAME], connection=conn, serializer=JSONSerializer,
            name=f"{base}-{attempt}" if attempt else base,
            job_monitoring_interval=monitoring_interval,
            maintenance_interval=maintenance_interval,
            # an idle worker wakes up every worker_ttl - 15 s: that is the cleaning cadence
            worker_ttl=max(16, maintenance_interval + 15))
        worker.abandon_grace_s = abandon_grace
        worker._swept_at = time.monotonic()  # swept at start-up, above
        try:
            worker.work(burst=burst, with_scheduler=with_scheduler and not burst,
                        max_jobs=max_jobs, logging_level=log_level)
        except (redis.ConnectionError, redis.TimeoutError) as exc:
            log.warning("lost Redis at %s (%s); reconnecting", redis_url, exc)
        if burst or max_jobs is not None or worker.stop_asked:
            return 0
        attempt += 1
        time.sleep(min(5.0, 0.5 * attempt))
