"""Population (mixed-effects) estimation."""
