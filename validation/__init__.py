"""Validation cases (data + sources) run by `crosswind validate` and the tests."""
