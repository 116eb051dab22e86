"""Exports of the store for models, GIS and publishing."""
