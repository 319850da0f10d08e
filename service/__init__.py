"""Keelson's service around engine/: the HTTP side (web), the store, the version
rules (versions), the use cases, the training worker and the tools (the
``keelson`` command, demo, import, benchmarks).

Importing this package imports nothing else: entry points install their signal
handling before anything heavy loads (service.process).
"""
