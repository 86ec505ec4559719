"""evenflag's Hydra plugins: the trade-off search sweeper (search_sweeper.py)."""
