"""Policies: one small protocol, one module per kind."""
