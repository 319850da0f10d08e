"""Keelson's numeric core: pure NumPy.

No I/O, no globals, no environment: everything comes in as arguments (random
state as a seed) and goes out as arrays or bytes. It imports neither Flask nor
SQLAlchemy and is usable and testable on its own; service/ decides where bytes live.
"""
