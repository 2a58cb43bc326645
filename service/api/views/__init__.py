"""Blueprints, one per area: health, metrics, openapi, models, scoring, admin."""
