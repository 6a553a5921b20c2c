"""The engine thread: series, routing, micro-batches, estimator updates, snapshots."""
