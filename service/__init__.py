"""Keelson's service: HTTP API, store, worker and command line around engine/."""
