"""Renderers: they format result values and never compute analyses."""
