"""The service tests' app fixtures, shared with the reliability tests."""

from tests.service.conftest import api, app  # noqa: F401  (pytest fixtures)
