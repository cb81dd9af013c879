"""Settings and the dependencies every route uses (auth, store, queue), swappable in tests.

Configuration comes from the environment (or the ``closure api`` options, which set the same
fields):

    CLOSURE_STORE          store folder (default ~/.closure/store)
    CLOSURE_REDIS_URL      Redis URL (redis://, unix://); required, never guessed
    CLOSURE_DB_URL         catalog database URL (default SQLite in the store folder)
    CLOSURE_DB_SCHEMA      PostgreSQL schema for the catalog tables (optional)
    CLOSURE_DATA_ROOTS     folders whose files jobs may read by path (os.pathsep-separated)
    CLOSURE_TOKEN          bearer token; required when serving on a non-loopback address
    CLOSURE_MAX_UPLOAD_MB  upload size limit in MiB (default 2048)
    CLOSURE_MAX_POINTS     grid points per snapshot of an input (default 134217728 = 512^3)
    CLOSURE_MAX_SNAPSHOTS  snapshots in an input (default 100000)
    CLOSURE_MAX_INPUT_GB   bytes an input declares, all variables together, in GiB
                           (default 256)

The three input limits are checked from the file's header (declared sizes, no data read), at
upload and at submission; their defaults suit one machine of some tens of GiB of memory.
"""

from __future__ import annotations

import hmac
import ipaddress
import os
from dataclasses import dataclass, field
from pathlib import Path

from fastapi import Depends, Request

from api.errors import AuthError
from closure.errors import UserError
from closure.store import Store

DEFAULT_STORE = "~/.closure/store"
DEFAULT_MAX_UPLOAD_MB = 2048.0
DEFAULT_MAX_POINTS = 2**27
DEFAULT_MAX_SNAPSHOTS = 100_000
DEFAULT_MAX_INPUT_GB = 256.0


@dataclass
class Settings:
    """Server configuration; see the module docstring for the environment variables."""

    store: Path
    redis_url: str | None
    db_url: str | None = None
    db_schema: str | None = None
    data_roots: tuple[Path, ...] = ()
    token: str | None = None
    max_upload_mb: float = DEFAULT_MAX_UPLOAD_MB
    max_points: int = DEFAULT_MAX_POINTS
    max_snapshots: int = DEFAULT_MAX_SNAPSHOTS
    max_input_gb: float = DEFAULT_MAX_INPUT_GB
    host: str = "127.0.0.1"
    extra: dict = field(default_factory=dict)

    @classmethod
    def from_env(cls, **overrides) -> Settings:
        """Settings from the CLOSURE_* environment, with explicit (non-None) overrides."""
        env = os.environ
        roots = [r for r in env.get("CLOSURE_DATA_ROOTS", "").split(os.pathsep) if r]
        values = dict(
            store=env.get("CLOSURE_STORE", DEFAULT_STORE),
            redis_url=env.get("CLOSURE_REDIS_URL") or None,
            db_url=env.get("CLOSURE_DB_URL") or None,
            db_schema=env.get("CLOSURE_DB_SCHEMA") or None,
            data_roots=roots,
            token=env.get("CLOSURE_TOKEN") or None,
            max_upload_mb=env.get("CLOSURE_MAX_UPLOAD_MB", DEFAULT_MAX_UPLOAD_MB),
            max_points=env.get("CLOSURE_MAX_POINTS", DEFAULT_MAX_POINTS),
            max_snapshots=env.get("CLOSURE_MAX_SNAPSHOTS", DEFAULT_MAX_SNAPSHOTS),
            max_input_gb=env.get("CLOSURE_MAX_INPUT_GB", DEFAULT_MAX_INPUT_GB),
        )
        values.update({k: v for k, v in overrides.items() if v is not None})
        try:
            values["max_upload_mb"] = float(values["max_upload_mb"])
        except ValueError:
            raise UserError("CLOSURE_MAX_UPLOAD_MB must be a number of MiB") from None
        if values["max_upload_mb"] <= 0:
            raise UserError("the upload limit must be positive (CLOSURE_MAX_UPLOAD_MB)")
        for key, var, kind in (("max_points", "CLOSURE_MAX_POINTS", int),
                               ("max_snapshots", "CLOSURE_MAX_SNAPSHOTS", int),
                               ("max_input_gb", "CLOSURE_MAX_INPUT_GB", float)):
            try:
                values[key] = kind(values[key])
            except ValueError:
                raise UserError(f"{var} must be a positive number") from None
            if values[key] <= 0:
                raise UserError(f"{var} must be a positive number")
        values["store"] = Path(values["store"]).expanduser()
        values["data_roots"] = tuple(Path(r).expanduser() for r in values["data_roots"])
        return cls(**values)

    def check(self) -> None:
        """Refuse configurations that would be unsafe or cannot work."""
        if not is_loopback(self.host) and not self.token:
            raise UserError(
                f"refusing to serve on {self.host} without a token: anyone who can reach it "
                "could run jobs; set CLOSURE_TOKEN (or --token), or bind to 127.0.0.1")
        if not self.redis_url:
            raise UserError("no Redis URL: give --redis URL or set CLOSURE_REDIS_URL "
                            "(`closure up` starts a Redis of its own)")
        for root in self.data_roots:
            if not root.is_dir():
                raise UserError(f"data root {root} is not a folder")


def is_loopback(host: str) -> bool:
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False


# --------------------------------------------------------------------------- dependencies

def get_settings(request: Request) -> Settings:
    return request.app.state.settings


def get_store(request: Request) -> Store:
    state = request.app.state
    if getattr(state, "store", None) is None:
        s = state.settings
        state.store = Store(s.store, s.db_url, s.db_schema)
    return state.store


def get_redis(request: Request):
    state = request.app.state
    if getattr(state, "redis", None) is None:
        from worker.queue import connect

        # short retry budget: a request should answer 503 soon rather than hang
        state.redis = connect(state.settings.redis_url, retry_seconds=3)
    return state.redis


def require_token(request: Request, settings: Settings = Depends(get_settings)) -> None:
    """Bearer-token check; a no-op when the server has no token (loopback only)."""
    if not settings.token:
        return
    header = request.headers.get("authorization", "")
    scheme, _, given = header.partition(" ")
    if scheme.lower() != "bearer" or not given:
        raise AuthError("this server needs a token: send 'Authorization: Bearer <token>' "
                        "(the CLI and client read CLOSURE_TOKEN)")
    if not hmac.compare_digest(given.strip().encode(), settings.token.encode()):
        raise AuthError("wrong token: check CLOSURE_TOKEN against the server's")
