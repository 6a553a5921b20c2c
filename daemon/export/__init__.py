"""Export: the metric model of a snapshot, the /metrics text, the /api/state JSON."""
