"""lapsewise: when to stop mailing lapsed customers, and how to spread a mail budget."""

__version__ = "0.1.0"
