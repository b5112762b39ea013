"""Evaluate: one simulator of the process, the demo scenario's data, policy simulation and the backtest."""
