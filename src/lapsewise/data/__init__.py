"""Data: quarters, the customer x quarter panel, per-customer summaries and distinct histories."""
