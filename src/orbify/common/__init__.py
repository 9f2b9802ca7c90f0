"""Shared plumbing with no project dependencies but the errors: safe file I/O, option checks, the version."""
