"""Test suite for asof_join."""
