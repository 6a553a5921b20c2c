"""Ingest: wire format v1, byte layouts, topic templates, ZeroMQ sources and CurveZMQ."""
