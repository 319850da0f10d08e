"""The service tests' app fixtures, shared with the reliability tests."""

from tests.service.conftest import any_api, any_app, api, app  # noqa: F401  (pytest fixtures)
