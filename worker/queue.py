"""The queue side of a job: Redis connections, submission, live progress, cancellation.

(The status document of a job of any kind is worker.status.status, one floor up: it needs
the modules of every kind of job, which all import this one.)

One user-visible job id (``j-...``) fans out into rq tasks with derived ids::

    <job>-plan           plan the job (input SHA-256, snapshots, split); enqueues the rest
    <job>-map-<k>        a group of snapshots each: one SufficientStats file per snapshot
    <job>-reduce         waits for every map (allow_failure) and fits the model

A snapshot split into slab tasks (worker.slabs, closure.slabtasks) has instead of a map::

    <job>-slab-<i>-<phase>-<k>   task k of a phase of snapshot i's pass (each phase waits
                                 for the one before it)
    <job>-finish-<i>             assembles snapshot i's coarse fields and statistics

The catalog row (closure.store) is the record of the job's state; Redis holds the live
progress in ``closure:job:<job>`` (a hash), the set of finished snapshots and map errors.
Everything on the queue is JSON (rq's JSONSerializer), never pickle.
"""

from __future__ import annotations

import contextlib
import json
import os
import time

import redis
from redis.backoff import ExponentialBackoff
from redis.retry import Retry as RedisRetry
from rq import Callback, Queue, Retry
from rq.command import send_stop_job_command
from rq.exceptions import InvalidJobOperation, NoSuchJobError
from rq.job import Job, JobStatus
from rq.serializers import JSONSerializer

from closure.store import epoch_time

QUEUE_NAME = "closure"
KEY_PREFIX = "closure:job:"
#: live-progress keys live on this long after a job ends (the catalog keeps the record)
PROGRESS_TTL_S = 7 * 24 * 3600

#: per-task wall-clock limits, seconds (env overrides for big inputs)
PLAN_TIMEOUT_S = int(os.environ.get("CLOSURE_PLAN_TIMEOUT", 900))
MAP_TIMEOUT_S = int(os.environ.get("CLOSURE_MAP_TIMEOUT", 3600))
REDUCE_TIMEOUT_S = int(os.environ.get("CLOSURE_REDUCE_TIMEOUT", 3600))
#: attempts after the first; a killed task is re-run this many times
TASK_RETRIES = int(os.environ.get("CLOSURE_TASK_RETRIES", 3))
#: map tasks per live worker when the snapshots are split automatically
TASKS_PER_WORKER = 2


def split_snapshots(indices: list[int], workers: int, per_task: int | None = None
                    ) -> list[list[int]]:
    """Group a job's snapshots into map tasks (contiguous, in plan order).

    ``per_task`` snapshots per task when given (1: one task per snapshot); otherwise about
    TASKS_PER_WORKER tasks per live worker, so every worker gets work and each task's start-up
    cost (a fresh work-horse opens the file and compiles the library, ~0.1 s) is paid a few
    times per job rather than once per snapshot. ``CLOSURE_SNAPSHOTS_PER_TASK`` sets
    ``per_task`` for the whole service.
    """
    if per_task is None:
        env = os.environ.get("CLOSURE_SNAPSHOTS_PER_TASK", "").strip()
        per_task = int(env) if env else None
    n = len(indices)
    if per_task is None:
        n_tasks = min(n, max(1, workers) * TASKS_PER_WORKER)
        per_task = -(-n // max(1, n_tasks))
    per_task = max(1, int(per_task))
    return [list(indices[k:k + per_task]) for k in range(0, n, per_task)]


def retry_policy() -> Retry:
    """Retry for every task. Intervals (seconds, from ``CLOSURE_RETRY_INTERVAL``, e.g. "1,5")
    need a worker running the rq scheduler; the default is an immediate re-run, which does
    not wait on whichever worker holds the scheduler lock."""
    spec = os.environ.get("CLOSURE_RETRY_INTERVAL", "").strip()
    intervals = [int(x) for x in spec.split(",") if x.strip()] if spec else 0
    return Retry(max=TASK_RETRIES, interval=intervals or 0)


def connect(url: str, *, retry_seconds: float = 30.0) -> redis.Redis:
    """A Redis client for ``url`` (redis://, rediss:// or unix://) that rides out a server
    restart of up to about ``retry_seconds`` by reconnecting with backoff."""
    retries = max(1, int(retry_seconds / 0.5))
    retry = RedisRetry(ExponentialBackoff(cap=0.5, base=0.05), retries)
    return redis.Redis.from_url(
        url, retry=retry, socket_connect_timeout=2, health_check_interval=10,
        retry_on_error=[redis.ConnectionError, redis.TimeoutError, redis.BusyLoadingError])


def get_queue(conn: redis.Redis) -> Queue:
    return Queue(QUEUE_NAME, connection=conn, serializer=JSONSerializer)


def fetch(conn: redis.Redis, rq_id: str) -> Job | None:
    try:
        return Job.fetch(rq_id, connection=conn, serializer=JSONSerializer)
    except NoSuchJobError:
        return None


# --------------------------------------------------------------------------- task ids

def plan_id(job_id: str) -> str:
    return f"{job_id}-plan"


def map_id(job_id: str, task: int) -> str:
    """rq id of the job's ``task``-th map task (see :func:`split_snapshots`)."""
    return f"{job_id}-map-{int(task)}"


def reduce_id(job_id: str) -> str:
    return f"{job_id}-reduce"


def slab_id(job_id: str, index: int, phase: str, task: int) -> str:
    """rq id of task ``task`` of ``phase`` of snapshot ``index``'s slab tasks."""
    return f"{job_id}-slab-{int(index)}-{phase}-{int(task)}"


def finish_id(job_id: str, index: int) -> str:
    """rq id of the task that finishes snapshot ``index`` after its slab tasks."""
    return f"{job_id}-finish-{int(index)}"


def slab_tasks(conn: redis.Redis, job_id: str) -> list[str]:
    """rq ids of every slab and finishing task of a job (empty when none was split)."""
    raw = conn.hget(progress_key(job_id), "slabs")
    if not raw:
        return []
    info = json.loads(raw)  # {"snapshots": [...], "tasks": K, "phases": [...]}
    ids = []
    for i in info["snapshots"]:
        ids += [slab_id(job_id, i, p, k) for p in info["phases"] for k in range(info["tasks"])]
        ids.append(finish_id(job_id, i))
    return ids


def progress_key(job_id: str) -> str:
    return KEY_PREFIX + job_id


def done_key(job_id: str) -> str:
    return KEY_PREFIX + job_id + ":done"


def errors_key(job_id: str) -> str:
    return KEY_PREFIX + job_id + ":errors"


# --------------------------------------------------------------------------- progress

def set_progress(conn: redis.Redis, job_id: str, **fields) -> None:
    """Set live-progress fields (phase, snapshots_total, phase_done, phase_total, ...)."""
    data = {k: (json.dumps(v) if isinstance(v, list | dict) else str(v))
            for k, v in fields.items() if v is not None}
    if data:
        with conn.pipeline() as p:
            p.hset(progress_key(job_id), mapping=data)
            p.expire(progress_key(job_id), PROGRESS_TTL_S)
            p.execute()


def read_progress(conn: redis.Redis, job_id: str) -> dict:
    """Live progress of a job: phase, snapshots done/total, and the current phase's counter."""
    with conn.pipeline() as p:
        p.hgetall(progress_key(job_id))
        p.scard(done_key(job_id))
        raw, n_done = p.execute()
    h = {k.decode(): v.decode() for k, v in raw.items()}
    return {
        "phase": h.get("phase", "queued"),
        "snapshots_done": int(n_done),
        "snapshots_total": int(h["snapshots_total"]) if "snapshots_total" in h else None,
        "phase_done": int(h["phase_done"]) if "phase_done" in h else None,
        "phase_total": int(h["phase_total"]) if "phase_total" in h else None,
    }


def is_canceled(conn: redis.Redis, job_id: str) -> bool:
    return conn.hget(progress_key(job_id), "canceled") == b"1"


def map_tasks(conn: redis.Redis, job_id: str) -> list[list[int]]:
    """The snapshot indices of each of a job's map tasks (empty before planning)."""
    raw = conn.hget(progress_key(job_id), "tasks")
    return json.loads(raw) if raw else []


# --------------------------------------------------------------------------- leases

#: a running task's lease lives this long past its last renewal (renewed every third of it)
LEASE_TTL_S = int(os.environ.get("CLOSURE_LEASE_TTL", 30))

_RENEW = "if redis.call('get', KEYS[1]) == ARGV[1] then " \
         "return redis.call('expire', KEYS[1], ARGV[2]) else return 0 end"
_RELEASE = "if redis.call('get', KEYS[1]) == ARGV[1] then " \
           "return redis.call('del', KEYS[1]) else return 0 end"


_RELEASE_OWNER = "local v = redis.call('get', KEYS[1]) " \
                 "if v and string.sub(v, 1, #ARGV[1]) == ARGV[1] then " \
                 "return redis.call('del', KEYS[1]) else return 0 end"


def lease_owner(worker_name: str, pid: int) -> str:
    """The prefix of the lease tokens a worker's work-horse ``pid`` takes."""
    return f"{worker_name}:{int(pid)}:"


def release_dead_lease(conn: redis.Redis, task_id: str, worker_name: str, pid: int) -> bool:
    """Drop a task's lease if the (now dead) work-horse ``pid`` of ``worker_name`` held it,
    so the retry starts at once instead of waiting for it to expire."""
    return bool(conn.eval(_RELEASE_OWNER, 1, f"closure:lease:{task_id}",
                          lease_owner(worker_name, pid)))


class LeaseHeld(RuntimeError):
    """Another copy of the task holds its lease (still running): this copy does not run."""


class Lease:
    """The right to run one rq task: a Redis key holding this copy's token, renewed by a
    heartbeat thread while the task runs and checked before the task stores its result, so
    a re-queued copy never runs (or stores) beside a still-running one. A copy that dies
    stops renewing, and its lease expires ``ttl`` seconds later."""

    def __init__(self, conn: redis.Redis, task_id: str, ttl: int | None = None):
        import uuid

        self.conn, self.key = conn, f"closure:lease:{task_id}"
        self.ttl = int(ttl or LEASE_TTL_S)
        # who holds it: the worker that forked this process and the process itself
        self.token = lease_owner(os.environ.get("RQ_WORKER_ID", "-"), os.getpid()) + \
            uuid.uuid4().hex
        self._stop = None

    def acquire(self, wait: float | None = None) -> Lease:
        """Take the lease, waiting up to ``wait`` seconds (default: one ttl and a little,
        long enough for a dead copy's lease to expire); LeaseHeld when it stays taken."""
        import threading

        deadline = time.monotonic() + (self.ttl + 5 if wait is None else wait)
        while not self.conn.set(self.key, self.token, nx=True, ex=self.ttl):
            if time.monotonic() >= deadline:
                raise LeaseHeld(f"another copy of {self.key.rsplit(':', 1)[-1]} is still "
                                "running; this one stands down (the queue retries it)")
            time.sleep(0.5)
        self._stop = threading.Event()
        thread = threading.Thread(target=self._renew, daemon=True, name="closure-lease")
        thread.start()
        return self

    def _renew(self) -> None:
        while not self._stop.wait(self.ttl / 3):
            try:
                if not self.conn.eval(_RENEW, 1, self.key, self.token, self.ttl):
                    return  # lost: held() says so before anything is stored
            except redis.RedisError:
                continue  # an outage: try again; the check before storing decides

    def held(self) -> bool:
        """Whether this copy still holds the lease (asked before storing a result)."""
        value = self.conn.get(self.key)
        return value is not None and value.decode() == self.token

    def release(self) -> None:
        if self._stop is not None:
            self._stop.set()
        with contextlib.suppress(redis.RedisError):
            self.conn.eval(_RELEASE, 1, self.key, self.token)

    def __enter__(self) -> Lease:
        return self.acquire()

    def __exit__(self, *exc) -> None:
        self.release()


# --------------------------------------------------------------------------- submit

def enqueue_plan(conn: redis.Redis, job_id: str, task: str = "worker.tasks.plan_task",
                 what: str = "") -> None:
    """Put a job's first task on the queue (the plan task enqueues the rest); ``task`` is the
    plan task of the job's kind, ``what`` names the kind in the task's description."""
    set_progress(conn, job_id, phase="queued", submitted=time.time())
    get_queue(conn).enqueue_call(
        task, args=(job_id,), job_id=plan_id(job_id),
        timeout=PLAN_TIMEOUT_S, retry=retry_policy(), result_ttl=PROGRESS_TTL_S,
        failure_ttl=PROGRESS_TTL_S, description=f"plan {what + ' ' if what else ''}{job_id}",
        on_failure=Callback("worker.tasks.on_task_failure"))


# --------------------------------------------------------------------------- status

def reconcile_plan_reduce(store, conn: redis.Redis, row: dict) -> dict:
    """Bring an active catalog row of a plan/map/reduce job in line with the queue: a plan or
    reduce task that failed for good (retries used up, worker lost) fails the job with an
    error the user can act on. Returns the (possibly updated) row. (worker.status.reconcile
    picks the right one for each kind of job.)"""
    if row["state"] not in ("queued", "running"):
        return row
    for rq_id, what in ((plan_id(row["id"]), "planning"), (reduce_id(row["id"]), "fitting"),
                        (f"{row['id']}-choose", "choosing by coarse runs")):
        job = fetch(conn, rq_id)
        if job is None:
            if rq_id.endswith("-plan") and time.time() - epoch_time(row["created"]) > 30 \
                    and not conn.exists(progress_key(row["id"])):
                message = ("the queue no longer knows this job (Redis lost its data, e.g. "
                           "restarted without appendonly persistence); submit it again")
                store.update_job(row["id"], state="failed", error=message, only_if_active=True)
                return store.get_job(row["id"])
            continue
        status = job.get_status(refresh=False)
        if status in (JobStatus.FAILED, JobStatus.STOPPED):
            message = f"{what} failed after {TASK_RETRIES + 1} attempts: {last_error(job)}"
            store.update_job(row["id"], state="failed", error=message, only_if_active=True)
            return store.get_job(row["id"])
    return row


def last_error(job: Job) -> str:
    """The last line of a failed task's traceback (the exception and its message)."""
    text = ""
    try:
        result = job.latest_result()
        if result is not None and result.exc_string:
            text = result.exc_string
    except Exception:  # noqa: BLE001 - a missing result is reported as such
        text = ""
    if not text:
        import warnings

        with warnings.catch_warnings():  # rq keeps exc_info only for older results
            warnings.simplefilter("ignore", DeprecationWarning)
            text = job.exc_info or ""
    lines = [ln for ln in str(text).strip().splitlines() if ln.strip()]
    return lines[-1].strip() if lines else "no error recorded (the worker was lost)"


def public_error(store, row: dict) -> str | None:
    """A job's error as its submitter may read it: an uploaded dataset named by its id, and
    no path inside the server's store."""
    error = row["error"]
    if not error:
        return error
    if row.get("dataset_id"):
        ds = store.get_dataset(row["dataset_id"], missing_ok=True)
        if ds is not None:
            error = error.replace(str(ds["path"]), f"dataset {row['dataset_id']}")
    error = error.replace(str(store.root), "<store>")
    if len(error) > 2000:  # an error listing many items stays readable
        error = error[:2000] + f"... ({len(error) - 2000} more characters left out)"
    return error


# --------------------------------------------------------------------------- cancel

def cancel(store, conn: redis.Redis, job_id: str) -> bool:
    """Cancel a queued or running job: flag it (tasks check the flag and return), cancel the
    tasks still waiting, stop the ones running, and mark the job canceled. Returns False when
    the job had already ended."""
    row = store.get_job(job_id)
    if row["state"] not in ("queued", "running"):
        return False
    set_progress(conn, job_id, canceled=1)
    store.update_job(job_id, state="canceled", error="canceled on request", only_if_active=True)
    stop_tasks(conn, job_id)
    import shutil

    # a task still running removes what it writes after this when it sees the job ended
    shutil.rmtree(store.job_dir(job_id), ignore_errors=True)
    return True


def stop_tasks(conn: redis.Redis, job_id: str) -> None:
    """Cancel every pending task of a job and stop the running ones."""
    ids = [plan_id(job_id), reduce_id(job_id), f"{job_id}-choose"]
    ids += [map_id(job_id, k) for k in range(len(map_tasks(conn, job_id)))]
    ids += slab_tasks(conn, job_id)
    total = conn.hget(progress_key(job_id), "phase_total")
    if conn.hget(progress_key(job_id), "phase") == b"coarse runs" and total:
        ids += [f"{job_id}-run-{k}" for k in range(int(total))]  # worker.selection's tasks
    for rq_id in ids:
        job = fetch(conn, rq_id)
        if job is None:
            continue
        state = job.get_status(refresh=False)
        try:
            if state == JobStatus.STARTED:
                send_stop_job_command(conn, rq_id, serializer=JSONSerializer)
            elif state in (JobStatus.QUEUED, JobStatus.DEFERRED, JobStatus.SCHEDULED):
                job.cancel()
        except InvalidJobOperation:
            pass  # it finished or was canceled in the meantime
