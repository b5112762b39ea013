"""App: the pipeline the command line and the demo share, rendering, the command line and the demo."""
