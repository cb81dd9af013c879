"""HTTP API of the closure service (FastAPI): see api.app.create_app."""
