"""Decide: the stop-rule program (the recursion, a plain twin for the tests), decisions, order values, the stop table."""
