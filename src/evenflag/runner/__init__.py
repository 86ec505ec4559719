"""Runs and sweeps: configuration, execution, provenance and tracking."""
