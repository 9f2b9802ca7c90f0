"""Proving a converted model: exactness checks, parameter and MAC counts, summaries, diffs and reports."""
