"""Shared fixtures. Bundles built here are reused by every test module."""
