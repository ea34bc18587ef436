"""Shipped model templates (TOML files); see compartments.library."""
