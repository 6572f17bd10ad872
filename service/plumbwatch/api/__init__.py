"""The HTTP API: FastAPI application, auth, routes and schemas."""

from plumbwatch.api.app import create_app

__all__ = ["create_app"]
