"""Estimation stages: physics-informed network, likelihood fit, uncertainty."""
