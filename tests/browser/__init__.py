"""Helpers for opening pages in headless Chromium from the tests (stdlib only)."""
