"""Serving: metrics and health endpoints."""
