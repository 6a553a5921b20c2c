"""``sigmad bench``: end-to-end throughput and memory against their references."""
