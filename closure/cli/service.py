"""CLI commands of the service: the local stack, the server processes and the HTTP client.

``closure up`` runs Redis (its own), the API and N workers until Ctrl-C; ``closure api`` and
``closure worker`` run one server process each (what docker-compose runs); ``closure submit``,
``status``, ``wait``, ``cancel`` and ``models`` talk to a server (``show`` and ``export``,
in closure/cli/apply.py, take a model file or a stored model id):
``--server URL``, else $CLOSURE_SERVER, else the running local stack's state file, else
http://127.0.0.1:8000; the token comes from $CLOSURE_TOKEN (or --token).
``closure demo`` runs the whole thing once on generated data.
"""

from __future__ import annotations

import json
import os
import sys
import time
from pathlib import Path

import typer

from closure.cli.inputs import (
    GROUP,
    LEVELS,
    MASK,
    NON_PERIODIC,
    SCALAR,
    SNAPSHOTS,
    SPACING,
    VAR,
)
from closure.errors import OptionError, UserError

SERVER = typer.Option(None, "--server", help="service URL (default: $CLOSURE_SERVER, the "
                      "running local stack, or http://127.0.0.1:8000)")
TOKEN = typer.Option(None, "--token", help="bearer token (default: $CLOSURE_TOKEN)")
STATE_DIR = typer.Option(None, "--state-dir", help="local stack folder (default: "
                         "$CLOSURE_HOME or ~/.closure)")
REDIS = typer.Option(None, "--redis", help="Redis URL (redis://HOST:PORT/DB or unix://PATH)")
STORE = typer.Option(None, "--store", help="store folder (models, datasets, catalog)")
DB = typer.Option(None, "--db", help="catalog database URL (default: SQLite in the store; "
                  "postgresql+psycopg://USER@HOST/DB)")
DB_SCHEMA = typer.Option(None, "--db-schema", help="PostgreSQL schema for the catalog tables")


def register(app: typer.Typer) -> None:
    """Add this module's commands to the app."""
    for fn in (up, demo, api, worker, submit, status, wait, cancel, models):
        app.command(name=fn.__name__)(fn)


# --------------------------------------------------------------------------- helpers

def _server(server: str | None, state_dir: Path | None = None) -> str:
    if server:
        return server
    if os.environ.get("CLOSURE_SERVER"):
        return os.environ["CLOSURE_SERVER"]
    from closure.localstack import read_state

    state = read_state(state_dir)
    if state:
        return state["server"]
    from closure.client import DEFAULT_SERVER

    return DEFAULT_SERVER


def _client(server: str | None, token: str | None):
    from closure.client import Client

    return Client(_server(server), token=token)


def _echo_status(doc: dict) -> None:
    p = doc.get("progress") or {}
    snaps = ""
    if p.get("snapshots_total") is not None:
        snaps = f", snapshots {p['snapshots_done']}/{p['snapshots_total']}"
    typer.echo(f"job {doc['id']}: {doc['state']} (phase {p.get('phase')}{snaps})")
    if doc.get("model_id"):
        typer.echo(f"model: {doc['model_id']}")
    if doc.get("error"):
        typer.echo(f"error: {doc['error']}")


# --------------------------------------------------------------------------- servers

def up(
    port: int = typer.Option(8000, "--port", help="API port (0: any free port)"),
    host: str = typer.Option("127.0.0.1", "--host", help="API address; anything but loopback "
                             "needs --token"),
    workers: int = typer.Option(2, "--workers", min=1, max=64, help="worker processes"),
    data_root: list[Path] = typer.Option(None, "--data-root", help="folder whose files jobs "
                                         "may read by path (repeatable)"),
    store: Path = STORE,
    redis: str = typer.Option(None, "--redis", help="use this Redis instead of starting one"),
    db: str = DB,
    db_schema: str = DB_SCHEMA,
    token: str = typer.Option(None, "--token", help="require this bearer token"),
    max_upload_mb: float = typer.Option(None, "--max-upload-mb", help="upload limit (MiB)"),
    state_dir: Path = STATE_DIR,
) -> None:
    """Run the local stack (a Redis of its own, the API, N workers) until Ctrl-C.

    Without --redis it starts the bundled redis-server on a unix socket in the state folder
    (append-only persistence there); it never uses a Redis that happens to be running.
    """
    from closure.localstack import LocalStack, default_state_dir

    stack = LocalStack(state_dir or default_state_dir(), port=port, host=host, workers=workers,
                       data_roots=data_root or (), store=store, redis_url=redis, db_url=db,
                       db_schema=db_schema, token=token or os.environ.get("CLOSURE_TOKEN"),
                       max_upload_mb=max_upload_mb)
    if host not in ("127.0.0.1", "::1", "localhost") and not stack.token:
        raise UserError(f"refusing to serve on {host} without a token: pass --token or set "
                        "CLOSURE_TOKEN")
    stack.start()
    typer.echo(f"closure service at {stack.server_url} (docs: {stack.server_url}/docs)")
    typer.echo(f"redis: {stack.redis_url}; store: {stack.store}; workers: {workers}")
    typer.echo(f"state: {stack.state_dir}; stop with Ctrl-C (or `kill {os.getpid()}`)")
    raise typer.Exit(stack.supervise(echo=lambda m: typer.echo(m, err=True)))


def api(
    host: str = typer.Option("127.0.0.1", "--host", help="address to listen on; anything but "
                             "loopback needs a token"),
    port: int = typer.Option(8000, "--port"),
    redis: str = REDIS,
    store: Path = STORE,
    db: str = DB,
    db_schema: str = DB_SCHEMA,
    data_root: list[Path] = typer.Option(None, "--data-root", help="folder whose files jobs "
                                         "may read by path (repeatable; $CLOSURE_DATA_ROOTS)"),
    token: str = typer.Option(None, "--token", help="bearer token ($CLOSURE_TOKEN)"),
    max_upload_mb: float = typer.Option(None, "--max-upload-mb", help="upload limit in MiB "
                                        "($CLOSURE_MAX_UPLOAD_MB)"),
    fd: int = typer.Option(None, "--fd", hidden=True, help="serve on this inherited socket"),
    log_level: str = typer.Option("info", "--log-level"),
) -> None:
    """Run the HTTP API (uvicorn). Options default to the CLOSURE_* environment."""
    from api.app import serve
    from api.deps import Settings

    settings = Settings.from_env(store=store, redis_url=redis, db_url=db, db_schema=db_schema,
                                 data_roots=data_root or None, token=token,
                                 max_upload_mb=max_upload_mb, host=host)
    serve(settings, port=port, fd=fd, log_level=log_level)


def worker(
    redis: str = REDIS,
    store: Path = STORE,
    db: str = DB,
    db_schema: str = DB_SCHEMA,
    name: str = typer.Option(None, "--name", help="worker name (default: host and pid)"),
    burst: bool = typer.Option(False, "--burst", help="quit when the queue is empty"),
    max_jobs: int = typer.Option(None, "--max-jobs", min=1, help="quit after this many tasks"),
    monitoring_interval: int = typer.Option(5, "--monitoring-interval", min=1,
                                            help="seconds between heartbeats of a running task"),
    abandon_grace: int = typer.Option(10, "--abandon-grace", min=1, help="seconds past a "
                                      "missed heartbeat before a task counts as lost"),
    maintenance_interval: int = typer.Option(10, "--maintenance-interval", min=1,
                                             help="seconds between lost-task sweeps"),
    data_root: list[Path] = typer.Option(None, "--data-root", help="folder inputs given by "
                                         "path must lie in, checked again when a task opens "
                                         "them (repeatable; $CLOSURE_DATA_ROOTS)"),
    log_level: str = typer.Option("INFO", "--log-level"),
) -> None:
    """Run one queue worker (rq, JSON serializer, with the scheduler).

    Options default to $CLOSURE_REDIS_URL, $CLOSURE_STORE, $CLOSURE_DB_URL and
    $CLOSURE_DB_SCHEMA."""
    from worker.main import run_worker

    redis = redis or os.environ.get("CLOSURE_REDIS_URL")
    if not redis:
        raise UserError("no Redis URL: give --redis URL or set CLOSURE_REDIS_URL")
    store_root = store or Path(os.environ.get("CLOSURE_STORE", "~/.closure/store")).expanduser()
    raise typer.Exit(run_worker(
        redis, str(store_root), db or os.environ.get("CLOSURE_DB_URL") or None,
        db_schema or os.environ.get("CLOSURE_DB_SCHEMA") or None, name=name, burst=burst,
        monitoring_interval=monitoring_interval, abandon_grace=abandon_grace,
        maintenance_interval=maintenance_interval, max_jobs=max_jobs,
        data_roots=data_root or None, log_level=log_level.upper()))


# --------------------------------------------------------------------------- client

def submit(
    inputs: list[str] = typer.Argument(
        None, metavar="INPUTS", help="fine-grid input(s): netCDF files, a quoted glob, a "
        "folder or a Zarr store (omit with --dataset); several inputs go by path only"),
    dataset: str = typer.Option(None, "--dataset", help="an uploaded dataset id instead"),
    spec_file: Path = typer.Option(None, "--spec", help="a job-spec JSON file; options below "
                                   "override its fields"),
    filter: str = typer.Option(None, "--filter", help="box, gaussian, spectral or block"),
    width: float = typer.Option(None, "--width", help="filter width (grid spacings by default)"),
    width_units: str = typer.Option(None, "--width-units", help="grid or coordinate"),
    ratio: int = typer.Option(None, "--ratio", help="coarsening ratio"),
    target: str = typer.Option(None, "--target", help="stress, force, vorticity or flux:NAME"),
    library: str = typer.Option(None, "--library", help="term-library preset or file"),
    method: str = typer.Option(None, "--method", help="threshold, lasso or ard"),
    scheme: str = typer.Option(None, "--scheme", help="spectral, fd2 or fd4"),
    test_fraction: float = typer.Option(None, "--test-fraction", help="held-out fraction"),
    resamples: int = typer.Option(None, "--resamples", help="resamples for uncertainty"),
    seed: int = typer.Option(None, "--seed"),
    var: list[str] = VAR,
    scalar: list[str] = SCALAR,
    group: str = GROUP,
    mask: str = MASK,
    levels: str = LEVELS,
    per_level: bool = typer.Option(False, "--per-level", help="one job (one model) per level "
                                   "of --levels (a list of indices)"),
    spacing: str = SPACING,
    snapshots: str = SNAPSHOTS,
    non_periodic: bool = NON_PERIODIC,
    memory_limit: str = typer.Option(
        None, "--memory-limit", help="memory one snapshot may use on a worker, e.g. 8G or 0.25 "
        "(of the worker machine's); larger snapshots go by slabs or slab tasks"),
    slab_tasks: int = typer.Option(
        None, "--slab-tasks", help="split each snapshot's fine-grid pass into this many queued "
        "tasks per phase (periodic data; 1: never split; default: split the snapshots past "
        "--memory-limit over the live workers)"),
    name: str = typer.Option(None, "--name", help="a label for the job"),
    upload: bool = typer.Option(None, "--upload/--by-path", help="always upload the file, or "
                                "never (default: by path when under the server's data roots, "
                                "else upload)"),
    server: str = SERVER,
    token: str = TOKEN,
) -> None:
    """Submit a discovery job; prints the job id as the last line.

    A local file is handed to the server by path when it lies under one of the server's data
    roots; otherwise it is uploaded first (use --upload / --by-path to choose).
    """
    from closure.cli.inputs import input_dict
    from closure.client import spec_from_options

    if bool(inputs) == (dataset is not None):
        raise OptionError("give an input file or --dataset ID (one of them)")
    base: dict = {}
    if spec_file is not None:
        try:
            base = json.loads(spec_file.read_text())
        except (OSError, ValueError) as exc:
            raise OptionError(f"--spec {spec_file}: cannot read a JSON spec ({exc})") from None
        if not isinstance(base, dict):
            raise OptionError(f"--spec {spec_file} must hold a JSON object (a job spec)")
    inp = input_dict(inputs or None, var=var, scalar=scalar, group=group, mask=mask,
                     levels=levels, per_level=per_level, spacing=spacing, snapshots=snapshots,
                     non_periodic=non_periodic, defaults=base.get("input") or {})
    if dataset is not None:
        inp.pop("path", None)
    spec = spec_from_options(
        None, dataset_id=dataset, filter=filter, width=width, width_units=width_units,
        ratio=ratio, target=target, library=library, method=method, scheme=scheme,
        test_fraction=test_fraction, resamples=resamples, seed=seed, base={**base, "input": inp})
    if memory_limit is not None:
        from closure.outofcore import parse_memory

        spec["memory_limit"] = parse_memory(memory_limit)
    if slab_tasks is not None:
        spec["slab_tasks"] = slab_tasks
    if inputs:
        single = Path(inputs[0])
        if len(inputs) == 1 and single.is_file():
            spec["input"]["path"] = str(single.resolve())
        else:
            if upload:
                raise OptionError("several inputs (or a glob, folder or Zarr store) go to the "
                                  "server by path: put them under one of its data roots and "
                                  "drop --upload")
            from closure.io import input_files

            files = [str(p.resolve()) for p in input_files(inputs)]
            spec["input"]["path"] = files[0] if len(files) == 1 else files
    specs = [spec]
    if spec["input"].get("per_level"):
        chosen = spec["input"].get("levels")
        if not isinstance(chosen, list):
            raise OptionError("--per-level on the service submits one job per level: list the "
                              "levels, e.g. --levels 0,5,10 (not all)")
        specs = [{**spec, "input": {**spec["input"], "levels": [k]}} for k in chosen]
    with _client(server, token) as c:
        for one in specs:
            doc = c.submit(one, name=name, upload=upload)
            if doc.get("reused"):
                typer.echo(f"an identical job exists ({doc['state']}"
                           + (f", model {doc['model_id']}" if doc.get("model_id") else "") + ")")
            typer.echo(doc["id"])


def status(job_id: str = typer.Argument(..., help="job id"),
           as_json: bool = typer.Option(False, "--json", help="the full status as JSON"),
           server: str = SERVER, token: str = TOKEN) -> None:
    """A job's state and progress."""
    with _client(server, token) as c:
        doc = c.status(job_id)
    if as_json:
        typer.echo(json.dumps(doc, indent=1))
    else:
        _echo_status(doc)


def wait(job_id: str = typer.Argument(..., help="job id"),
         output: Path = typer.Option(None, "-o", "--output", help="write the model JSON here"),
         timeout: float = typer.Option(None, "--timeout", help="give up after this many s"),
         quiet: bool = typer.Option(False, "--quiet", "-q", help="no progress bar"),
         server: str = SERVER, token: str = TOKEN) -> None:
    """Wait for a job with a progress bar; exit 0 only if it succeeded.

    A failed or canceled job prints its error and exits with status 1."""
    from closure.client import JobFailedError

    with _client(server, token) as c:
        try:
            with _progress(not quiet) as update:
                doc = c.wait(job_id, progress=update, timeout=timeout)
        except JobFailedError as exc:
            typer.echo(f"error: {exc}", err=True)
            raise typer.Exit(1) from None
        typer.echo(f"job {job_id} succeeded: model {doc['model_id']}")
        if output is not None:
            c.closure_model(doc["model_id"]).save(output)  # the full model file, as discover's
            typer.echo(f"model written to {output}")


class _progress:
    """Rich progress bar fed by status documents (on a terminal; silent otherwise)."""

    def __init__(self, enabled: bool):
        self.enabled = enabled and sys.stderr.isatty()
        self.bar = None

    def __enter__(self):
        if not self.enabled:
            return None
        from rich.console import Console
        from rich.progress import BarColumn, MofNCompleteColumn, Progress, TimeElapsedColumn

        self.bar = Progress("[progress.description]{task.description}", BarColumn(),
                            MofNCompleteColumn(), TimeElapsedColumn(),
                            console=Console(stderr=True), transient=True)
        self.bar.__enter__()
        task = self.bar.add_task("queued", total=None)

        def update(doc: dict) -> None:
            p = doc.get("progress") or {}
            phase = p.get("phase") or doc["state"]
            if phase in ("map", "queued", "plan") or p.get("phase_total") is None:
                done, total = p.get("snapshots_done"), p.get("snapshots_total")
                label = f"{phase} (snapshots)"
            else:
                done, total, label = p.get("phase_done"), p.get("phase_total"), phase
            self.bar.update(task, description=label, completed=done or 0, total=total)

        return update

    def __exit__(self, *exc):
        if self.bar is not None:
            self.bar.__exit__(*exc)


def cancel(job_id: str = typer.Argument(..., help="job id"), server: str = SERVER,
           token: str = TOKEN) -> None:
    """Cancel a queued or running job."""
    with _client(server, token) as c:
        _echo_status(c.cancel(job_id))


def models(dataset: str = typer.Option(None, "--dataset", help="dataset id or SHA-256"),
           target: str = typer.Option(None, "--target"),
           filter: str = typer.Option(None, "--filter", help="filter kind"),
           min_r2: float = typer.Option(None, "--min-r2", help="least held-out R^2"),
           limit: int = typer.Option(50, "--limit"),
           as_json: bool = typer.Option(False, "--json"),
           server: str = SERVER, token: str = TOKEN) -> None:
    """List stored models (newest first)."""
    with _client(server, token) as c:
        rows = c.models(dataset=dataset, target=target, filter=filter, min_r2=min_r2,
                        limit=limit)
    if as_json:
        typer.echo(json.dumps(rows, indent=1))
        return
    if not rows:
        typer.echo("no models")
        return
    typer.echo(f"{'id':24} {'target':10} {'filter':16} {'scheme':8} {'method':9} "
               f"{'terms':>5} {'test R2':>8}  dataset")
    for r in rows:
        filt = f"{r['filter_kind']} r={r['filter_ratio']}"
        r2 = "" if r["test_r2"] is None else f"{r['test_r2']:.4f}"
        typer.echo(f"{r['id']:24} {r['target']:10} {filt:16} {r['scheme']:8} {r['method']:9} "
                   f"{r['n_terms'] if r['n_terms'] is not None else '':>5} {r2:>8}  "
                   f"{r['dataset_sha256'][:12]}")


def fetch_report(model_id: str, output: Path, server: str | None = None,
                 token: str | None = None) -> Path:
    """Download a stored model's HTML report (built by the server) into ``output``."""
    with _client(server, token) as c:
        return c.download_report(model_id, output)


# --------------------------------------------------------------------------- demo

def demo(
    state_dir: Path = typer.Option(None, "--state-dir", help="the demo's folder: data, stack, "
                                   "store, report (default: $CLOSURE_HOME/demo or "
                                   "~/.closure/demo; kept after the demo)"),
    n: int = typer.Option(64, "--n", help="grid points per direction of the demo data"),
    snapshots: int = typer.Option(6, "--snapshots", help="snapshots of demo data"),
    workers: int = typer.Option(2, "--workers", min=1, max=16),
    ratio: int = typer.Option(4, "--ratio"),
    duration: float = typer.Option(5.0, "--duration", help="length of each coarse run, s: "
                                   "the candidates' (selection) and the long a posteriori "
                                   "runs'; statistics after the first fifth"),
) -> None:
    """Discover a closure for generated 2-D turbulence through a local stack, end to end.

    Starts Redis, the API and workers in the demo folder, submits the discovery job with
    selection by coarse runs (the candidates along the sparse paths each run ``--duration``
    in the coarse solver, as queued tasks; the sparsest stable one within the tolerance of
    the best long-run statistics is stored), queues a long a posteriori run of the model
    against the baselines, has the service build the model's report, prints the model, the
    candidates, the report's path and the a posteriori tables, and stops the stack.
    Everything stays in the folder (run it again and the stored results are reused)."""
    from closure.client import Client, JobFailedError
    from closure.localstack import LocalStack, default_state_dir

    t0 = time.monotonic()
    root = Path(state_dir) if state_dir is not None else default_state_dir() / "demo"
    data = root / "data"
    data.mkdir(parents=True, exist_ok=True)
    path = data / f"turb2d-{n}x{n}-{snapshots}.nc"
    if path.is_file():  # the same data as before: the stored model and results are reused
        typer.echo(f"demo data: {path} (generated before)")
    else:
        typer.echo(f"generating demo data: 2-D turbulence, {n}x{n}, {snapshots} snapshots")
        from closure.synth import turb2d, write

        write(turb2d(n=n, snapshots=snapshots), path)
    if n // ratio < 16:  # the coarse runs need the demo's forcing shell (modes 3..5) resolved
        ratio = max(1, n // 16)
        typer.echo(f"note: ratio {ratio} keeps a {n // ratio}x{n // ratio} coarse grid, which "
                   "resolves the demo's forcing in the coarse runs")
    stack = LocalStack(root / "stack", port=0, workers=workers, data_roots=[data])
    typer.echo("starting a local stack (redis, API, workers) ...")
    les = les_error = None
    with stack:
        typer.echo(f"service at {stack.server_url}")
        with Client(stack.server_url) as c:
            spinup = duration / 5
            job = c.submit({"input": {"path": str(path)}, "filter": {"ratio": ratio},
                            "fit": {"select": "aposteriori", "duration": duration,
                                    "spinup": spinup, "max_candidates": 3}}, name="demo")
            typer.echo(f"job {job['id']} queued")
            with _progress(True) as update:
                doc = c.wait(job["id"], progress=update, timeout=600)
            model_id = doc["model_id"]
            model = c.model(model_id)
            run = c.run_aposteriori(model_id, long_duration=duration, spinup=spinup)
            typer.echo(f"a posteriori run {run['id']} queued (the model and the baselines "
                       f"in the coarse solver, {duration:g} s long)")
            try:
                with _progress(True) as update:
                    c.wait(run["id"], progress=update, timeout=600)
                les = c.aposteriori(model_id)
            except JobFailedError as exc:
                les_error = str(exc)
            c.report_files(model_id)  # the service builds the report (with the a posteriori runs)
        where = Path(stack.store) / "models" / model_id
    typer.echo("")
    typer.echo(model["summary"])
    typer.echo("")
    from closure.model import ClosureModel
    from closure.selection import Selection

    record = ClosureModel.load(where / "model.json").settings.get("aposteriori_selection")
    if record:
        typer.echo("Selection by coarse runs: every candidate along the sparse paths ran "
                   f"{duration:g} s in the coarse solver (one queued task each):")
        typer.echo(Selection(record["candidates"], record["chosen"], record["tolerance"],
                             record.get("settings") or {}).table())
        if record["chosen"] is None:
            typer.echo("no candidate was stable: the stored model is the a priori one")
        typer.echo("")
    typer.echo(f"model {model_id} stored in {where}")
    typer.echo(f"report: {where / 'report' / 'index.html'}")
    typer.echo("")
    if les is not None:
        typer.echo("A posteriori: the model and the baselines in the coarse solver (run on the "
                   "queue), from the filtered first snapshot, against the filtered DNS; then "
                   f"long-run statistics after {spinup:g} s against every filtered snapshot:")
        typer.echo(les["table"])
        for name, r in (les.get("runs") or {}).items():
            if r.get("status") == "blew up":
                typer.echo(f"{name}: {r.get('message')}")
        dynamic = les["result"]["runs"].get("dynamic", {}).get("diagnostics", {})
        if dynamic.get("dynamic_constant"):
            c = dynamic["dynamic_constant"]
            typer.echo(f"dynamic: Germano-Lilly C = C_s^2 from {min(c):.3g} to {max(c):.3g} "
                       "(negative values clipped to 0)")
    else:
        typer.echo(f"A posteriori: no result ({les_error})")
    typer.echo("A priori skill does not guarantee a stable or accurate coarse simulation: "
               "validate the model a posteriori before relying on it.")
    typer.echo(f"demo finished in {time.monotonic() - t0:.1f} s; its files stay in {root}")
