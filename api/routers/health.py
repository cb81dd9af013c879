"""/health: is the queue, the catalog and at least one worker there?"""

from __future__ import annotations

from fastapi import APIRouter, Depends, Response

from api.deps import get_redis, get_store

router = APIRouter(tags=["health"])


@router.get("/health", summary="Redis, catalog database and workers")
def health(response: Response, conn=Depends(get_redis), store=Depends(get_store)) -> dict:
    """200 when Redis and the catalog answer (``workers`` may still be 0), 503 otherwise."""
    from rq import Worker

    from worker import queue as q

    out: dict = {"redis": {"ok": False}, "db": {"ok": False}, "workers": 0, "queue": {}}
    try:
        conn.ping()
        out["redis"] = {"ok": True}
        queue = q.get_queue(conn)
        out["workers"] = Worker.count(queue=queue)
        # counts without cleanup: the registries are the workers' to clean
        out["queue"] = {
            "queued": queue.count,
            "started": queue.started_job_registry.get_job_count(cleanup=False),
            "failed": queue.failed_job_registry.get_job_count(cleanup=False)}
    except Exception as exc:  # noqa: BLE001 - reported, not raised
        out["redis"] = {"ok": False, "error": f"{type(exc).__name__}: {exc}"}
    try:
        store.ping()
        out["db"] = {"ok": True}
    except Exception as exc:  # noqa: BLE001
        out["db"] = {"ok": False, "error": f"{type(exc).__name__}: {exc}"}
    out["status"] = "ok" if out["redis"]["ok"] and out["db"]["ok"] else "unavailable"
    if out["status"] != "ok":
        response.status_code = 503
    return out
