"""Renderers: text, JSON, HTML, figures and CSV details of results computed elsewhere."""
