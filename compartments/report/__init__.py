"""Presentation: rich tables, plots, JSON/CSV/Markdown exports."""
