"""Renderers: JSON, the plain-text log and the HTML page. Formatting only, no computation."""
