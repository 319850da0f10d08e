"""Keelson's service: HTTP API, store, worker and command line around engine/."""

from service.app import create_app

__all__ = ["create_app"]
